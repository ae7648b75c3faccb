"""The argument parser of ``mfma`` (standard library only, so ``--help`` is fast)."""

from __future__ import annotations

import argparse
import sys

from assistant import __version__
from assistant.cli._common import add_controller_options, number_list, positive, scenario_names


class _Formatter(argparse.HelpFormatter):
    """Help text wrapped at spaces only: a name such as ``reference-film`` is never split at its hyphen."""

    def _split_lines(self, text: str, width: int) -> list[str]:
        import textwrap

        return textwrap.wrap(self._whitespace_matcher.sub(" ", text).strip(), width, break_on_hyphens=False)


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line error message and exit status 2.

    A list option followed by a negative list (``--biases -1,0,1``) looks to argparse like another option; the
    message then shows the spelling that works (``--biases=-1,0,1``).
    """

    argv: list[str] = []  # the arguments being parsed, for the hint (set by the top-level parser)

    def __init__(self, *args, **kwargs) -> None:
        kwargs.setdefault("formatter_class", _Formatter)
        super().__init__(*args, **kwargs)

    def parse_known_args(self, args=None, namespace=None):  # type: ignore[override]
        if self.prog == "mfma":
            _Parser.argv = list(sys.argv[1:] if args is None else args)
        return super().parse_known_args(args, namespace)

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"{self.prog}: error: {message}{_negative_hint(message, _Parser.argv)}\n")
        raise SystemExit(2)


def command_line() -> list[str]:
    """The arguments the top-level parser parsed last (what the operator typed after ``mfma``)."""
    return list(_Parser.argv)


def _negative_hint(message: str, argv: list[str]) -> str:
    import re

    m = re.search(r"argument (--[\w-]+)(?:/\S+)?: expected one argument", message)
    if not m or m.group(1) not in argv:
        return ""
    i = argv.index(m.group(1))
    value = argv[i + 1] if i + 1 < len(argv) else ""
    if re.fullmatch(r"-[\d.]", value[:2]):
        return f" (a value that starts with '-' needs '=': {m.group(1)}={value})"
    return ""


def _json(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")


MIN_LINES = 8  # procedures.series: the least lines a series may have
MIN_LINES_ANALYSIS = 4  # procedures.analyse: the least completed lines the decomposition works on


def build_parser() -> argparse.ArgumentParser:
    top = _Parser(prog="mfma", description="Magnetic force microscopy: cantilever calibration, lift-height and "
                                           "bias series with their decomposition, field series, stray-field maps "
                                           "and recorded-track metrics, on a real controller or the built-in "
                                           "simulated stage.",
                  epilog="Every command has --help. Output files go into ./mfma-out unless --out says otherwise: "
                         "session-<UTC time>.h5 and its report folder report-<UTC time>/.")
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
    p.add_argument("--rate", type=positive(), required=True, metavar="HZ", help="sample rate in Hz")
    p.add_argument("--out", required=True, metavar="FILE.npy", help="output .npy file (1-D float32, volts)")
    _json(p)
    p.set_defaults(handler="cmd_acquire:thermal")
    p = acq.add_parser("sweep", help="drive sweep of the free lever to a CSV file")
    add_controller_options(p)
    p.add_argument("--start", type=positive(), required=True, metavar="HZ", help="start frequency in Hz")
    p.add_argument("--stop", type=positive(), required=True, metavar="HZ", help="stop frequency in Hz")
    p.add_argument("--points", type=positive(int), required=True, help="number of frequencies")
    p.add_argument("--drive-v", type=positive(), default=0.05, metavar="V", help="drive amplitude in V (default 0.05)")
    p.add_argument("--out", required=True, metavar="FILE.csv",
                   help="output CSV (header frequency_hz,amplitude_v,phase_deg)")
    _json(p)
    p.set_defaults(handler="cmd_acquire:sweep")

    # ---- analyze ----------------------------------------------------------------------------------------
    ana = sub.add_parser("analyze", help="analyze recorded data offline (no controller)").add_subparsers(
        title="what", metavar="WHAT", parser_class=_Parser)
    p = ana.add_parser("thermal", help="fit a thermal spectrum: f0, Q, peak area, and k or the optical-lever "
                                       "sensitivity")
    p.add_argument("file", help="deflection record: .npy (volts), .csv (header volts, or time_s,volts) or a "
                                "session file (.h5, its last calibration's spectrum)")
    p.add_argument("--rate", type=positive(), metavar="HZ",
                   help="sample rate in Hz (required for .npy, and for .csv without a time_s column)")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--invols", type=positive(), metavar="NM_PER_V",
                   help="optical-lever sensitivity (InvOLS) you measured, in nm/V: gives k")
    g.add_argument("--k", type=positive(), metavar="N_PER_M",
                   help="spring constant you know, in N/m: gives the non-contact optical-lever sensitivity")
    p.add_argument("--k-std", type=positive(), metavar="N_PER_M",
                   help="uncertainty of --k in N/m, carried into the sensitivity's uncertainty (default 0)")
    p.add_argument("--invols-std", type=positive(), metavar="NM_PER_V",
                   help="uncertainty of --invols in nm/V, carried into k's uncertainty (default 0)")
    p.add_argument("--temperature-k", type=positive(), metavar="K",
                   help="temperature of the lever in K (default: the one a session file recorded, else 295.15)")
    p.add_argument("--f0-hz-guess", type=positive(), metavar="HZ",
                   help="start the peak fit near this resonance frequency in Hz instead of searching the spectrum")
    p.add_argument("--detection", choices=("optical-lever", "displacement"), default="optical-lever",
                   help="how the deflection was detected (sets the Butt-Jaschke factor 0.817 or 0.971)")
    p.add_argument("--plot", metavar="FILE.png", help="also write the spectrum with the fit as a PNG")
    _json(p)
    p.set_defaults(handler="cmd_analyze:thermal")
    p = ana.add_parser("sader", help="spring constant of a rectangular lever by the Sader method")
    p.add_argument("--length-um", type=positive(), required=True, metavar="UM", help="lever length in µm")
    p.add_argument("--width-um", type=positive(), required=True, metavar="UM", help="lever width in µm")
    p.add_argument("--f0-hz", type=positive(), required=True, metavar="HZ", help="resonance frequency in air in Hz")
    p.add_argument("--q", type=positive(), required=True, help="quality factor in air")
    p.add_argument("--temperature-k", type=positive(), default=295.15, metavar="K",
                   help="air temperature in K (default 295.15)")
    p.add_argument("--pressure-pa", type=positive(), default=101325.0, metavar="PA",
                   help="air pressure in Pa (default 101325)")
    _json(p)
    p.set_defaults(handler="cmd_analyze:sader")
    p = ana.add_parser("sweep", help="fit a drive sweep CSV: f0, Q, phase offset")
    p.add_argument("file", help="CSV with the header frequency_hz,amplitude_v,phase_deg")
    p.add_argument("--plot", metavar="FILE.png", help="also write the sweep with the fit as a PNG")
    _json(p)
    p.set_defaults(handler="cmd_analyze:sweep")
    p = ana.add_parser("series", help="decompose a lift-height series into magnetic, electrostatic, short-range",
                       description=f"Decompose a lift-height series (at least 3 heights and "
                                   f"{MIN_LINES_ANALYSIS} completed lines) into its magnetic, electrostatic "
                                   f"and short-range parts and recommend a lift height and tip bias.")
    p.add_argument("file", help=".npz (phase_deg, heights_nm, pixel_nm as one spacing or [row, col], optional "
                                "bias_v, spring_constant_n_per_m, quality_factor, tip_radius_nm, amplitude_nm, "
                                "gap_offset_nm, repeat_phase_deg, phase_reference_std_deg, ...) or a session file "
                                "(.h5)")
    p.add_argument("--series", metavar="NAME", help="series name inside a session file (default: the last)")
    p.add_argument("--short-range-fraction", type=positive(), default=0.1, metavar="FRACTION",
                   help="short-range part allowed at the recommended lift, as a fraction of magnetic (0.1)")
    p.add_argument("--edge", choices=("auto", "reflect", "window", "periodic"), default="auto",
                   help="how the scan's edges are treated: reflect (the scan mirrored at its edges; fast), window "
                        "(the field outside fitted as unknown; exact at the edges, slower), periodic (scans that are "
                        "one period of the pattern), auto (default: reflect, and window where the reflected fit "
                        "misfits at a height that meets the other criteria)")
    p.add_argument("--plots", metavar="DIR", help="also write the decomposition figures to DIR")
    _per_height(p)
    _json(p)
    p.set_defaults(handler="cmd_analyze:series")
    p = ana.add_parser("loop", help="switching fields, loop, coercive field and switching-field spread of a field "
                                    "series")
    p.add_argument("file", help=".npz (phase_deg (fields, rows, cols), field_ka_per_m (fields,), pixel_nm, optional "
                                "topography_m (rows, cols)) or a session file (.h5)")
    p.add_argument("--field-series", metavar="NAME", help="field series inside a session file (default: the last)")
    p.add_argument("--tip-moment", choices=("auto", "up", "down"), default="auto",
                   help="the tip's magnetisation at the first step: along +z (up) or -z (down); auto (default): "
                        "the direction in which the elements follow the field")
    p.add_argument("--plots", metavar="DIR", help="also write the loop figures to DIR")
    _json(p)
    p.set_defaults(handler="cmd_analyze_loop:run")

    p = ana.add_parser("image", help="magnetisation orientation and recorded-track metrics of one image")
    p.add_argument("file", help=".npz (phase_deg (rows, cols), pixel_nm as one spacing or [row, col], optional "
                                "lift_nm, amplitude_nm, gap_offset_nm) or a session file (.h5): one height of a "
                                "series")
    p.add_argument("--series", metavar="NAME", help="series name inside a session file (default: the last)")
    p.add_argument("--height-nm", type=float, metavar="NM", help="the height of the series to analyze (default: "
                   "the lowest where the tip-sample interaction is negligible)")
    p.add_argument("--thickness-nm", type=float, metavar="NM", help="film thickness (default: fitted)")
    p.add_argument("--tip-offset-nm", type=float, metavar="NM", help="the tip as a point dipole this far behind "
                   "the apex (e.g. from a tip calibration): taken off the transition width")
    p.add_argument("--amplitude-nm", type=float, metavar="NM", help="peak oscillation amplitude in the image "
                   "(default: the file's or the series' own): its averaging is taken off the transition width")
    p.add_argument("--plots", metavar="DIR", help="also write the transition map and the jitter histogram to DIR")
    _json(p)
    p.set_defaults(handler="cmd_analyze_image:run")

    _quantitative_parsers(ana)

    # ---- calibrate, probes --------------------------------------------------------------------------------
    p = sub.add_parser("calibrate", help="calibrate the mounted probe: resonance, Q, k (Sader), optical-lever "
                                         "sensitivity")
    add_controller_options(p)
    _calibration_options(p)
    _out(p)
    _json(p)
    p.set_defaults(handler="cmd_calibrate:run")
    p = sub.add_parser("probes", help="list the probe record: each probe's calibration history")
    p.add_argument("name", nargs="?", help="show one probe's history (default: every probe, latest calibration)")
    _json(p)
    p.set_defaults(handler="cmd_probes:run")

    # ---- run, report ----------------------------------------------------------------------------------------
    p = sub.add_parser("run", help="the whole session: calibrate, approach, lift-height series, analysis, report")
    add_controller_options(p)
    _calibration_options(p)
    p.add_argument("--heights", type=number_list, metavar="NM,...", help="lift heights in nm "
                   "(default 10,15,20,30,50,75,100); one or two give the images, their noise and V_cpd, three or "
                   "more also the decomposition and a recommended lift height")
    p.add_argument("--biases", type=number_list, metavar="V,...", default=[-0.5, 0.0, 0.5, 1.0],
                   help="tip biases in V: three or more make a bias grid at every height, which separates the "
                        "electrostatic part and finds V_cpd (default -0.5,0,0.5,1); one value: every second pass "
                        "at that bias, no grid; two: images at both (one or two heights only). A list that starts "
                        "with a minus sign needs '=': --biases=-1,0,1")
    p.add_argument("--lines", type=positive(int), default=32,
                   help=f"scan lines (default 32, at least {MIN_LINES}; the decomposition needs "
                        f"{MIN_LINES_ANALYSIS} completed lines)")
    p.add_argument("--pixels", type=positive(int), default=128, help=f"pixels per line (default 128, at least "
                                                                     f"{MIN_LINES})")
    p.add_argument("--size-um", type=positive(), default=4.0, metavar="UM", help="scan size in µm (default 4)")
    p.add_argument("--no-repeat", action="store_true", help="do not repeat the first height in each line")
    p.add_argument("--fields-ka-per-m", metavar="LIST|START:STOP:STEP",
                   help="a field series instead of a lift series: applied fields in kA/m, as a list or as "
                        "START:STOP:STEP (from START to STOP and back); one lift height (--heights, default 50 nm)")
    p.add_argument("--pace", choices=("fast", "realtime"), default="fast",
                   help="simulated stage only: fast (virtual clock, default) or realtime (waits as an instrument "
                        "would)")
    p.add_argument("--line-rate", type=positive(), default=1.0, metavar="HZ",
                   help="lines per second per pass (default 1)")
    _out(p)
    p.add_argument("--resume", metavar="FILE.h5", help="continue an interrupted session file")
    p.add_argument("--limits", metavar="FILE.toml", help="software safety limits (TOML; see DEVELOPERS.md)")
    p.add_argument("--fsync", action="store_true", help="fsync the session file after every line")
    p.add_argument("--field-map", action="store_true",
                   help="also map the stray field at the recommended height with the probe's stored TTF (--probe)")
    _per_height(p)
    _json(p)
    p.set_defaults(handler="cmd_run:run")
    p = sub.add_parser("report", help="figures and a summary from one or more session files")
    p.add_argument("sessions", nargs="+", metavar="SESSION.h5",
                   help="session file(s); each gets its own folder report-<UTC time>/ (named after the file)")
    p.add_argument("--out", metavar="DIR",
                   help="folder in which the report folders go (default: next to each session file)")
    _per_height(p)
    _json(p)
    p.set_defaults(handler="cmd_report:run")

    # ---- serve, keys, tui -----------------------------------------------------------------------------------
    p = sub.add_parser("serve", help="serve the simulated controller over a serial pseudo-terminal or ZeroMQ")
    p.add_argument("--transport", choices=("serial", "zmq"), required=True,
                   help="serial: a pseudo-terminal (its path is printed); zmq: a ZeroMQ socket")
    p.add_argument("--bind", metavar="URL", help="zmq: tcp://127.0.0.1:PORT (default: a free loopback port)")
    p.add_argument("--scenario", metavar="FILE_OR_NAME",
                   help=f"simulated-stage scenario: a TOML file or a built-in name ({scenario_names()})")
    p.add_argument("--seed", type=int, default=None, help="random seed of the simulated stage")
    p.add_argument("--pace", choices=("fast", "realtime"), default="fast",
                   help="fast (virtual clock, default) or realtime (waits as an instrument would)")
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
    p.add_argument("directory", metavar="DIR", help="folder for the key pair (created if needed)")
    p.add_argument("name", metavar="NAME", help="name of the key pair (the file names' stem)")
    p.set_defaults(handler="cmd_keys:generate")
    p = sub.add_parser("tui", help="the terminal user interface",
                       description="The terminal user interface. Keys: 1-7 switch views, ctrl+g withdraws the "
                                   "tip from any view (also the Withdraw button), ? shows every key.")
    add_controller_options(p)
    _out(p)
    p.add_argument("--open", metavar="SESSION.h5",
                   help="show a stored session file read-only: its settings, plots and report; no controller")
    p.set_defaults(handler="cmd_tui:run")
    return top


def _quantitative_parsers(ana) -> None:
    """``analyze tip`` and ``analyze field`` (quantitative MFM)."""
    images = ("phase_deg (rows, cols) with lift_nm, or a stack with heights_nm; pixel_nm, spring_constant_n_per_m, "
              "quality_factor, optional amplitude_nm, gap_offset_nm")
    p = ana.add_parser("tip", help="calibrate the tip transfer function (TTF) on an image of a reference film")
    p.add_argument("reference", help=f"reference image: .npz ({images}) or a session file (.h5)")
    p.add_argument("--ms-ka-per-m", type=float, required=True, metavar="MS",
                   help="the reference film's (effective) saturation magnetisation in kA/m")
    p.add_argument("--thickness-nm", type=float, required=True, metavar="T", help="its magnetic thickness in nm")
    p.add_argument("--ms-std-ka-per-m", type=positive(allow_zero=True), metavar="S",
                   help="standard uncertainty of Ms in kA/m (default 5 %% of Ms)")
    p.add_argument("--thickness-std-nm", type=positive(allow_zero=True), metavar="S",
                   help="standard uncertainty of the thickness in nm (default 5 %%)")
    p.add_argument("--plane-std-nm", type=positive(allow_zero=True), default=0.0, metavar="S",
                   help="standard uncertainty of the measurement plane (lift, gap, amplitude) in nm (default 0)")
    p.add_argument("--probe", metavar="NAME", help="store the TTF in the probe record under this probe")
    p.add_argument("--tip-moment", choices=("up", "down"), default="up",
                   help="tip magnetised along +z, away from the sample (default), or down")
    p.add_argument("--out", required=True, metavar="TIP.npz", help="tip file to write")
    p.add_argument("--plots", metavar="DIR", help="also write the TTF and reference-pattern figures to DIR")
    _json(p)
    p.set_defaults(handler="cmd_quantitative:tip")
    p = ana.add_parser("field", help="map the stray field Hz of a sample with a calibrated TTF")
    p.add_argument("image", help=f"image of the sample: .npz ({images}) or a session file (.h5)")
    p.add_argument("--tip", metavar="TIP.npz", help="tip file from mfma analyze tip")
    p.add_argument("--probe", metavar="NAME", help="use the newest TTF stored for this probe")
    p.add_argument("--height-nm", type=float, metavar="H",
                   help="plane of the map above the sample in nm (default: the measurement plane; higher planes by "
                        "continuation)")
    p.add_argument("--plane-std-nm", type=positive(allow_zero=True), default=0.0, metavar="S",
                   help="standard uncertainty of this image's measurement plane in nm (default 0)")
    p.add_argument("--out", required=True, metavar="FIELD.npz", help="field file to write")
    p.add_argument("--plots", metavar="DIR", help="also write the field-map figures to DIR")
    _json(p)
    p.set_defaults(handler="cmd_quantitative:field")


def _json(p: argparse.ArgumentParser) -> None:
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout (progress stays on stderr)")


def _out(p: argparse.ArgumentParser) -> None:
    p.add_argument("--out", default="mfma-out", metavar="DIR",
                   help="output folder for session-<UTC time>.h5 and its report-<UTC time>/ (default ./mfma-out)")


def _per_height(p: argparse.ArgumentParser) -> None:
    p.add_argument("--per-height-scale", action="store_true",
                   help="phase maps: give each lift height its own colour scale (default: one scale shared by "
                        "every height, so contrast compares across heights); the figure captions say which")


def _calibration_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--probe", metavar="NAME", help="probe name for the probe record")
    p.add_argument("--length-um", type=positive(), metavar="UM",
                   help="lever length in µm (nominal, for the Sader method)")
    p.add_argument("--width-um", type=positive(), metavar="UM",
                   help="lever width in µm (nominal, for the Sader method)")
    p.add_argument("--temperature-k", type=positive(), metavar="K",
                   help="air temperature in K (default: the instrument's sensor, else 295.15)")
    p.add_argument("--pressure-pa", type=positive(), default=101325.0, metavar="PA",
                   help="air pressure in Pa (default 101325)")
    p.add_argument("--thermal-seconds", type=positive(), default=2.0, metavar="S",
                   help="thermal record length in s (default 2)")
    p.add_argument("--free-amplitude-nm", type=positive(), default=20.0, metavar="NM",
                   help="free oscillation amplitude in nm (default 20)")
    p.add_argument("--setpoint-ratio", type=positive(), default=0.7, metavar="RATIO",
                   help="amplitude setpoint as a fraction of the free amplitude (default 0.7)")
    p.add_argument("--invols", type=positive(), metavar="NM_PER_V",
                   help="an optical-lever sensitivity (InvOLS) you measured, in nm/V: makes the thermal k an "
                        "independent check of Sader")
    p.add_argument("--invols-std", type=positive(), metavar="NM_PER_V",
                   help="standard uncertainty of --invols in nm/V (default: 2 %% of it, common practice for a "
                        "force-curve sensitivity)")
    p.add_argument("--contact-invols", action="store_true",
                   help="measure the optical-lever sensitivity from a force curve on the surface (wears the "
                        "magnetic coating!)")
