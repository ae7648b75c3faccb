"""The argument parser of ``mfma`` (standard library only, so ``--help`` is fast)."""

from __future__ import annotations

import argparse
import sys

from assistant import __version__
from assistant.cli._common import add_controller_options, number_list, positive


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line error message and exit status 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"{self.prog}: error: {message}\n")
        raise SystemExit(2)


def _json(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")


def build_parser() -> argparse.ArgumentParser:
    top = _Parser(prog="mfma", description="Cantilever calibration and lift-height series for magnetic force "
                                           "microscopy, on a real controller or the built-in simulated stage.")
    top.add_argument("--version", action="version", version=f"mfma {__version__}")
    top.add_argument("--debug", action="store_true", help=argparse.SUPPRESS)
    sub = top.add_subparsers(title="commands", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("drivers", help="list installed controller plug-ins and their URL schemes; check a driver "
                                       "(check URL) or start one (new NAME DIR)")
    _json(p)
    p.set_defaults(handler="cmd_drivers:run")
    verbs = p.add_subparsers(title="verbs (none: list the plug-ins)", metavar="VERB", parser_class=_Parser)
    q = verbs.add_parser("check", help="run the conformance kit against a controller driver")
    q.add_argument("url", metavar="URL", help="controller URL, e.g. sim://, mylab://..., zmq+tcp://HOST:PORT")
    q.add_argument("--level", choices=("identity", "signals", "motion", "engaged"), default="signals",
                   help="how far to go; each level includes those before it: identity, signals (default; nothing "
                        "moves), motion (moves clear of the surface), engaged (approaches the surface)")
    q.add_argument("--yes", action="store_true", help="do not ask before the levels that move the stage")
    _json(q)
    q.set_defaults(handler="cmd_drivers_check:check")
    q = verbs.add_parser("new", help="write a package skeleton for a lab's own controller driver")
    q.add_argument("name", help="driver name: lower-case letters, digits and _ (also the URL scheme)")
    q.add_argument("directory", metavar="DIR", help="folder to create (must not exist or be empty)")
    q.set_defaults(handler="cmd_drivers_check:new")

    # ---- acquire ----------------------------------------------------------------------------------------
    acq = sub.add_parser("acquire", help="record raw data from a controller").add_subparsers(
        title="what", metavar="WHAT", parser_class=_Parser)
    p = acq.add_parser("thermal", help="record the free lever's deflection (thermal noise) to a .npy file")
    add_controller_options(p)
    p.add_argument("--seconds", type=positive(), required=True, help="record length in s")
    p.add_argument("--rate", type=positive(), required=True, help="sample rate in Hz")
    p.add_argument("--out", required=True, help="output .npy file (1-D float32, volts)")
    _json(p)
    p.set_defaults(handler="cmd_acquire:thermal")
    p = acq.add_parser("sweep", help="drive sweep of the free lever to a CSV file")
    add_controller_options(p)
    p.add_argument("--start", type=positive(), required=True, help="start frequency in Hz")
    p.add_argument("--stop", type=positive(), required=True, help="stop frequency in Hz")
    p.add_argument("--points", type=positive(int), required=True, help="number of frequencies")
    p.add_argument("--drive-v", type=positive(), default=0.05, help="drive amplitude in V (default 0.05)")
    p.add_argument("--out", required=True, help="output CSV (frequency_hz,amplitude_v,phase_deg)")
    _json(p)
    p.set_defaults(handler="cmd_acquire:sweep")

    # ---- analyze ----------------------------------------------------------------------------------------
    ana = sub.add_parser("analyze", help="analyse recorded data offline").add_subparsers(
        title="what", metavar="WHAT", parser_class=_Parser)
    p = ana.add_parser("thermal", help="fit a thermal spectrum: f0, Q, peak area, k or InvOLS")
    p.add_argument("file", help=".npy (volts), .csv (volts or time_s,volts) or a session file (.h5)")
    p.add_argument("--rate", type=positive(), help="sample rate in Hz (required unless the file carries it)")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--invols", type=positive(), metavar="NM_PER_V", help="static sensitivity in nm/V -> k")
    g.add_argument("--k", type=positive(), metavar="N_PER_M", help="known spring constant in N/m -> InvOLS")
    p.add_argument("--temperature", type=positive(), default=295.15, metavar="K", help="temperature in K")
    p.add_argument("--detection", choices=("optical-lever", "displacement"), default="optical-lever",
                   help="how the deflection was detected (sets the Butt-Jaschke factor 0.817 or 0.971)")
    p.add_argument("--plot", metavar="PNG", help="also write the spectrum with the fit")
    _json(p)
    p.set_defaults(handler="cmd_analyze:thermal")
    p = ana.add_parser("sader", help="spring constant of a rectangular lever by the Sader method")
    p.add_argument("--length-um", type=positive(), required=True, help="lever length in µm")
    p.add_argument("--width-um", type=positive(), required=True, help="lever width in µm")
    p.add_argument("--f0-hz", type=positive(), required=True, help="resonance frequency in air in Hz")
    p.add_argument("--q", type=positive(), required=True, help="quality factor in air")
    p.add_argument("--temperature-k", type=positive(), default=295.15, help="air temperature in K")
    p.add_argument("--pressure-pa", type=positive(), default=101325.0, help="air pressure in Pa")
    _json(p)
    p.set_defaults(handler="cmd_analyze:sader")
    p = ana.add_parser("sweep", help="fit a drive sweep CSV: f0, Q, phase offset")
    p.add_argument("file", help="CSV with header frequency_hz,amplitude_v,phase_deg")
    p.add_argument("--plot", metavar="PNG", help="also write the sweep with the fit")
    _json(p)
    p.set_defaults(handler="cmd_analyze:sweep")
    p = ana.add_parser("series", help="decompose a lift-height series into magnetic, electrostatic, short-range")
    p.add_argument("file", help=".npz (phase_deg, heights_nm, pixel_nm as one spacing or [row, col], optional "
                                "bias_v, spring_constant_n_per_m, quality_factor, tip_radius_nm, amplitude_nm, "
                                "gap_offset_nm, repeat_phase_deg) or a session file (.h5)")
    p.add_argument("--series", help="series name inside a session file (default: the first)")
    p.add_argument("--short-range-fraction", type=positive(), default=0.1,
                   help="short-range part allowed at the recommended lift, as a fraction of magnetic (0.1)")
    p.add_argument("--edge", choices=("auto", "reflect", "window", "periodic"), default="auto",
                   help="how the scan's edges are treated: reflect (the scan mirrored at its edges; fast), window "
                        "(the field outside fitted as unknown; exact at the edges, slower), periodic (scans that are "
                        "one period of the pattern), auto (default: reflect, and window where the reflected fit "
                        "misfits at a height that meets the other criteria)")
    p.add_argument("--plots", metavar="DIR", help="also write the decomposition figures to DIR")
    _json(p)
    p.set_defaults(handler="cmd_analyze:series")

    # ---- calibrate, probes --------------------------------------------------------------------------------
    p = sub.add_parser("calibrate", help="calibrate the mounted probe: resonance, Q, k (Sader), InvOLS")
    add_controller_options(p)
    _calibration_options(p)
    p.add_argument("--out", metavar="FILE.h5", help="session file to write (default: a new one in ./sessions)")
    _json(p)
    p.set_defaults(handler="cmd_calibrate:run")
    p = sub.add_parser("probes", help="list the probe record: each probe's calibration history")
    p.add_argument("name", nargs="?", help="show one probe's history")
    _json(p)
    p.set_defaults(handler="cmd_probes:run")

    # ---- run, report ----------------------------------------------------------------------------------------
    p = sub.add_parser("run", help="the whole session: calibrate, approach, lift-height series, analysis, report")
    add_controller_options(p)
    _calibration_options(p)
    p.add_argument("--heights", type=number_list, metavar="NM,...", help="lift heights in nm "
                   "(default 10,15,20,30,50,75,100)")
    p.add_argument("--biases", type=number_list, metavar="V,...", default=[-0.5, 0.0, 0.5, 1.0],
                   help="tip biases in V: three or more make a bias grid at every height, which separates the "
                        "electrostatic part and finds V_cpd (default -0.5,0,0.5,1); one value: every second pass "
                        "at that bias, no grid")
    p.add_argument("--lines", type=positive(int), default=32, help="scan lines (default 32)")
    p.add_argument("--pixels", type=positive(int), default=128, help="pixels per line (default 128)")
    p.add_argument("--size-um", type=positive(), default=4.0, help="scan size in µm (default 4)")
    p.add_argument("--no-repeat", action="store_true", help="do not repeat the first height at the end of lines")
    p.add_argument("--pace", choices=("fast", "realtime"), default="fast", help="simulated stage pacing")
    p.add_argument("--line-rate", type=positive(), default=1.0, metavar="HZ", help="lines per second per pass")
    p.add_argument("--out", default="mfma-out", metavar="DIR", help="output folder (default ./mfma-out)")
    p.add_argument("--resume", metavar="FILE", help="continue an interrupted session file")
    p.add_argument("--limits", metavar="FILE", help="software safety limits (TOML)")
    p.add_argument("--fsync", action="store_true", help="fsync the session file after every line")
    _json(p)
    p.set_defaults(handler="cmd_run:run")
    p = sub.add_parser("report", help="figures and a summary from a session file")
    p.add_argument("session", help="session file (.h5)")
    p.add_argument("--out", metavar="DIR", help="output folder (default: next to the session file)")
    _json(p)
    p.set_defaults(handler="cmd_report:run")

    # ---- serve, keys, tui -----------------------------------------------------------------------------------
    p = sub.add_parser("serve", help="serve the simulated controller over a serial pseudo-terminal or ZeroMQ")
    p.add_argument("--transport", choices=("serial", "zmq"), required=True)
    p.add_argument("--bind", metavar="URL", help="zmq: tcp://127.0.0.1:PORT (default: a free loopback port)")
    p.add_argument("--scenario", metavar="FILE_OR_NAME", help="simulated-stage scenario")
    p.add_argument("--seed", type=int, default=None, help="random seed of the simulated stage")
    p.add_argument("--pace", choices=("fast", "realtime"), default="fast", help="simulated stage pacing")
    p.add_argument("--server-key", metavar="FILE", help="server secret key file (CURVE)")
    p.add_argument("--allow", metavar="DIR", help="directory of allowed client public keys (CURVE)")
    p.add_argument("--watchdog", type=positive(), default=5.0, metavar="S",
                   help="withdraw when an engaged client is silent this long (default 5 s)")
    p.add_argument("--faults", metavar="SPEC", help="fault injection: comma-separated KIND:KEY=VALUE specs, "
                   "e.g. 'timeout:after=5,nan_reading:probability=0.01'")
    p.set_defaults(handler="cmd_serve:run")
    keys = sub.add_parser("keys", help="CURVE key pairs for the network link").add_subparsers(
        title="action", metavar="ACTION", parser_class=_Parser)
    p = keys.add_parser("generate", help="write NAME.key (public) and NAME.key_secret into DIR")
    p.add_argument("directory")
    p.add_argument("name")
    p.set_defaults(handler="cmd_keys:generate")
    p = sub.add_parser("tui", help="the terminal user interface")
    p.add_argument("--controller", default="sim://", metavar="URL")
    p.add_argument("--scenario", metavar="FILE_OR_NAME")
    p.add_argument("--seed", type=int, default=None)
    p.add_argument("--open", metavar="SESSION.h5", help="show a session file's series and analysis")
    p.set_defaults(handler="cmd_tui:run")
    return top


def _calibration_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--probe", metavar="NAME", help="probe name for the probe record")
    p.add_argument("--length-um", type=positive(), help="lever length in µm (nominal, for the Sader method)")
    p.add_argument("--width-um", type=positive(), help="lever width in µm (nominal, for the Sader method)")
    p.add_argument("--temperature-k", type=positive(), help="air temperature in K (default: the instrument's sensor, else 295.15)")
    p.add_argument("--pressure-pa", type=positive(), default=101325.0, help="air pressure in Pa")
    p.add_argument("--thermal-seconds", type=positive(), default=2.0, help="thermal record length in s")
    p.add_argument("--free-amplitude-nm", type=positive(), default=20.0, help="free amplitude in nm")
    p.add_argument("--setpoint-ratio", type=positive(), default=0.7, help="setpoint / free amplitude")
    p.add_argument("--invols", type=positive(), metavar="NM_PER_V",
                   help="a sensitivity you measured: makes the thermal k an independent check of Sader")
    p.add_argument("--contact-invols", action="store_true",
                   help="measure InvOLS from a force curve on the surface (wears the magnetic coating!)")
