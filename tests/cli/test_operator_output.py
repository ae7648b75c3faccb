"""Output a person reads: numbers, help, errors, progress, output folders (in-process, small inputs)."""

from __future__ import annotations

import io
import json

import numpy as np
import pytest

from assistant.cli import main
from assistant.formatting import duration, number, number_list, percent, progress_text, quantity, yes_no

PNG = b"\x89PNG\r\n\x1a\n"


@pytest.mark.parametrize("text, expected", [
    (quantity(74991.4, "Hz", 4.7), "74.9914 ± 0.0047 kHz"), (quantity(3.17749e-05, "m"), "31.77 µm"),
    (quantity(0.25547, "V"), "255.5 mV"), (quantity(1.83715e-05, "Pa s"), "18.37 µPa·s"),
    (quantity(2e6, "Hz"), "2 MHz"), (quantity(262144, ""), "262144"), (quantity(0.0873, "deg"), "0.0873°"),
    (quantity(15, "nm"), "15 nm"), (quantity(74996.5, "Hz"), "75.00 kHz"), (quantity(0, "m"), "0 µm"),
    (number(1.8e-5), "1.8 × 10⁻⁵"), (number(3e-9, 1.04e-10), "(3.00 ± 0.10) × 10⁻⁹"),
    (number(float("nan")), "—"), (percent(0.098, 0.003), "9.80 ± 0.30 %"), (yes_no(1), "yes"), (yes_no(0), "no"),
    (duration(4.1), "4.1 s"), (duration(200), "3 min 20 s"), (number_list([0, 1.05e-6, 4.2e-6], "m"), "0, 1.05, 4.2 µm"),
    (progress_text("approach", 3.17749e-05, 3e-4, "m"), "approach 31.8 of 300 µm"),
    (progress_text("series", 8, 16, "lines"), "series 8 of 16 lines"),
])
def test_numbers_for_people(text, expected):
    # the issue's own examples: "approach 31.8 of 300 µm", not "3.17749e-05/0.0003 m"
    assert text == expected


def test_every_option_and_positional_has_help_and_the_scenarios_are_listed():
    from assistant.cli.parser import build_parser

    def walk(parser, path):
        for action in parser._actions:
            if action.help is None and action.dest not in ("help",) and not action.option_strings == []:
                raise AssertionError(f"{path} {action.option_strings} has no help")
            if not action.option_strings and action.help is None and action.nargs != 0 and action.dest != "==SUPPRESS==":
                choices = getattr(action, "choices", None)
                if not isinstance(choices, dict):
                    raise AssertionError(f"{path} positional {action.dest} has no help")
            if isinstance(getattr(action, "choices", None), dict):
                for name, sub in action.choices.items():
                    walk(sub, f"{path} {name}")

    walk(build_parser(), "mfma")
    text = build_parser()._subparsers._group_actions[0].choices["run"].format_help()
    for name in ("default", "dot-array", "inplane-bits", "soft-film"):
        assert name in text
    series = build_parser()._subparsers._group_actions[0].choices["analyze"]._subparsers._group_actions[0].choices
    assert "4 completed lines" in series["series"].format_help()
    assert "--temperature-k" in series["thermal"].format_help() and "--temperature " not in series["thermal"].format_help()


def test_negative_list_gets_the_spelling_that_works(capsys):
    assert main(["run", "--biases", "-1,0,1"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.endswith("needs '=': --biases=-1,0,1)") and len(err.splitlines()) == 1


def _thermal_csv(path, *, bad_line=None):
    rng = np.random.default_rng(3)
    v = rng.normal(size=4096) * 1e-3
    rows = [f"{x:.6e}" for x in v]
    if bad_line is not None:
        rows[bad_line] = "1.0e-3x"
    path.write_text("volts\n" + "\n".join(rows) + "\n")


def test_thermal_and_sweep_plots_are_written(tmp_path, capsys):
    from assistant.analysis.calibration import oscillator_response

    f = np.linspace(74e3, 76e3, 201)
    amp, phase = oscillator_response(f, f0_hz=75e3, q=200.0, amplitude_at_resonance_v=0.02, phase_offset_deg=-5.0)
    sweep = tmp_path / "s.csv"
    sweep.write_text("frequency_hz,amplitude_v,phase_deg\n" + "\n".join(f"{a},{b},{c}" for a, b, c in zip(f, amp, phase)))
    assert main(["analyze", "sweep", str(sweep), "--plot", str(tmp_path / "sw.png")]) == 0
    out = capsys.readouterr().out
    assert "resonance f0: 75" in out and "kHz" in out and (tmp_path / "sw.png").read_bytes()[:8] == PNG
    # a thermal record of a lever (Nørrelykke & Flyvbjerg 2011 exact sampling, as the stage does) is costly; the
    # session route reads a stored spectrum instead: an oscillator PSD (its formula in assistant.analysis.calibration.thermal_fit)
    from assistant.analysis.calibration import oscillator_psd
    from assistant.storage import SessionFile

    fs = np.linspace(0, 1e6, 2**15 + 1)
    psd = oscillator_psd(fs, f0_hz=75e3, q=200.0, a0_v2_per_hz=2e-14, white_v2_per_hz=1e-16)
    session = tmp_path / "session-x.h5"
    with SessionFile.create(session, controller_url="sim://", software_version="0") as s:
        s.write_calibration({"spectrum_segments": 20}, {"spectrum_frequency_hz": fs, "spectrum_psd_v2_per_hz": psd})
    png = tmp_path / "th.png"
    assert main(["analyze", "thermal", str(session), "--k", "2.8", "--k-std", "0.1", "--plot", str(png),
                 "--temperature-k", "296"]) == 0
    out = capsys.readouterr().out
    assert png.read_bytes()[:8] == PNG
    assert "optical-lever sensitivity (InvOLS): " in out and " ± " in out and "nm/V" in out
    assert main(["analyze", "thermal", str(session), "--k", "2.8", "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["invols_std_nm_per_v"] > 0 and d["invols_nm_per_v"] > 0  # the non-contact route has its uncertainty


def test_thermal_reanalysis_of_a_session_uses_its_recorded_temperature(tmp_path, capsys):
    # A0 = 2.04015e-14 V^2/Hz at f0 = 75 kHz, Q = 200 is k = 2.8 N/m with InvOLS 50 nm/V at 298.15 K (Higgins et
    # al. 2006, Rev. Sci. Instrum. 77, 013701, with the Butt & Jaschke 1995 factor 0.817434; check value of
    # tests/analysis/calibration/test_thermal.py). Read at 295.15 K instead, InvOLS is 0.5 % low.
    from assistant.analysis.calibration import oscillator_psd
    from assistant.storage import SessionFile

    fs = np.linspace(0, 1e6, 2**15 + 1)
    psd = oscillator_psd(fs, f0_hz=75e3, q=200.0, a0_v2_per_hz=2.04015e-14, white_v2_per_hz=1e-17)
    spectrum = {"spectrum_frequency_hz": fs, "spectrum_psd_v2_per_hz": psd}
    with SessionFile.create(tmp_path / "warm.h5", controller_url="sim://", software_version="0") as s:
        s.write_calibration({"spectrum_segments": 20, "temperature_k": 298.15}, spectrum)
    with SessionFile.create(tmp_path / "bare.h5", controller_url="sim://", software_version="0") as s:
        s.write_calibration({"spectrum_segments": 20}, spectrum)
    assert main(["analyze", "thermal", str(tmp_path / "warm.h5"), "--k", "2.8", "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["temperature_k"] == 298.15
    assert d["invols_nm_per_v"] == pytest.approx(50.0, rel=5e-4)
    assert main(["analyze", "thermal", str(tmp_path / "warm.h5"), "--k", "2.8"]) == 0
    assert "298.1 K as the session recorded it" in capsys.readouterr().out
    assert main(["analyze", "thermal", str(tmp_path / "warm.h5"), "--k", "2.8", "--temperature-k", "295.15",
                 "--json"]) == 0  # a given temperature wins
    assert json.loads(capsys.readouterr().out)["invols_nm_per_v"] == pytest.approx(50.0 * (295.15 / 298.15) ** 0.5,
                                                                                   rel=5e-4)
    assert main(["analyze", "thermal", str(tmp_path / "bare.h5"), "--k", "2.8"]) == 0
    assert "295.1 K assumed, ± 3 K in the errors: give the lever's temperature with --temperature-k" in \
        capsys.readouterr().out
    # InvOLS ~ T^(1/2): to first order (2 sigma_InvOLS / InvOLS)^2 holds (sigma_T / T)^2 (standard propagation);
    # assumed, T is uncertain by 3 K, read or given by 1 K, and nothing else differs
    rel2 = {}
    for extra in ([], ["--temperature-k", "295.15"]):
        assert main(["analyze", "thermal", str(tmp_path / "bare.h5"), "--k", "2.8", "--json", *extra]) == 0
        d = json.loads(capsys.readouterr().out)
        rel2[bool(extra)] = (2 * d["invols_std_nm_per_v"] / d["invols_nm_per_v"]) ** 2
    assert rel2[False] - rel2[True] == pytest.approx((3.0**2 - 1.0**2) / 295.15**2, rel=1e-6)
    # a session whose calibration assumed the temperature recorded its wider error, and the reanalysis keeps it
    with SessionFile.create(tmp_path / "kept.h5", controller_url="sim://", software_version="0") as s:
        s.write_calibration({"spectrum_segments": 20, "temperature_k": 295.15, "temperature_std_k": 3.0}, spectrum)
    assert main(["analyze", "thermal", str(tmp_path / "kept.h5"), "--k", "2.8", "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert (2 * d["invols_std_nm_per_v"] / d["invols_nm_per_v"]) ** 2 == pytest.approx(rel2[False], rel=1e-9)


def test_thermal_fit_starts_at_the_given_resonance(tmp_path, capsys):
    # two oscillator peaks (formula in assistant.analysis.calibration.thermal_fit): the search takes the one of the
    # larger area (150 kHz); --f0-hz-guess 75000 starts the fit at the other
    from assistant.analysis.calibration import oscillator_psd
    from assistant.storage import SessionFile

    fs = np.linspace(0, 1e6, 2**15 + 1)
    psd = (oscillator_psd(fs, f0_hz=75e3, q=100.0, a0_v2_per_hz=2e-14, white_v2_per_hz=1e-16)
           + oscillator_psd(fs, f0_hz=150e3, q=100.0, a0_v2_per_hz=3e-14))
    session = tmp_path / "two.h5"
    with SessionFile.create(session, controller_url="sim://", software_version="0") as s:
        s.write_calibration({"spectrum_segments": 20}, {"spectrum_frequency_hz": fs, "spectrum_psd_v2_per_hz": psd})
    assert main(["analyze", "thermal", str(session), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["f0_hz"] == pytest.approx(150e3, rel=1e-3)
    assert main(["analyze", "thermal", str(session), "--f0-hz-guess", "75000", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["f0_hz"] == pytest.approx(75e3, rel=1e-3)


def test_messages_in_the_users_terms(tmp_path, capsys):
    fake = tmp_path / "fake.h5"
    fake.write_text("hello")
    assert main(["analyze", "thermal", str(fake)]) == 2
    assert capsys.readouterr().err.strip() == (f"mfma: error: {fake} is not an HDF5 file (it lacks the HDF5 signature): "
                                               f"give a session file written by mfma, a .npy record or a .csv")
    csv = tmp_path / "rec.csv"
    _thermal_csv(csv, bad_line=6)
    assert main(["analyze", "thermal", str(csv), "--rate", "1e6"]) == 2
    err = capsys.readouterr().err.strip()
    assert err == f"mfma: error: {csv}, line 8: '1.0e-3x' in column volts is not a number", err  # header = line 1


def test_report_of_two_sessions_and_one_folder_convention(tmp_path, capsys):
    from assistant.storage import SessionFile

    paths = []
    for stamp in ("20260101T000000Z", "20260101T000100Z"):
        p = tmp_path / f"session-{stamp}.h5"
        with SessionFile.create(p, controller_url="sim://", software_version="0") as s:
            s.write_calibration({"f0_hz": 75e3, "k_n_per_m": 2.8, "k_std_n_per_m": 0.1})
        paths.append(p)
    assert main(["report", *map(str, paths), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert [r["report_dir"] for r in d["reports"]] == [str(tmp_path / "report-20260101T000000Z"),
                                                        str(tmp_path / "report-20260101T000100Z")]
    text = (tmp_path / "report-20260101T000100Z" / "summary.md").read_text()
    assert "| spring constant k | 2.80 ± 0.10 N/m |" in text and "| resonance f0 | 75 kHz |" in text


def test_plain_progress_is_rounded_and_at_most_once_a_second():
    from assistant.cli.progress import StageProgress
    from assistant.procedures.events import Notice, Progress

    now = [0.0]
    out = io.StringIO()
    p = StageProgress(stream=out, tty=False, clock=lambda: now[0])
    for i in range(1, 31):  # 30 approach steps, 0.1 s apart
        now[0] = i * 0.1
        p(Progress("approach", i * 1e-5, 3e-4, "m", now[0]))
    p(Notice("warning", "stopped (X: y); tip withdrawn, drive off, bias 0 V", kind="stopped"))
    p.close()
    lines = out.getvalue().splitlines()
    assert lines[0] == "approach 10 of 300 µm"
    assert len([ln for ln in lines if ln.startswith("approach")]) <= 4  # 3 s of events: one a second, the last
    assert lines[-1].startswith("stopped: ")  # the progress held back goes before the stop notice, not after it
    assert "stopped: tip withdrawn, drive off, bias 0 V" in lines and not any("X: y" in ln for ln in lines)
    assert all("e-0" not in ln for ln in lines)


def test_plain_progress_writes_a_finished_step_before_what_follows():
    # the last line of a step ("report 5 of 5 ...") comes at once, not when the command ends after its summary
    from assistant.cli.progress import StageProgress
    from assistant.procedures.events import Progress

    out = io.StringIO()
    p = StageProgress(stream=out, tty=False, clock=lambda: 0.0)  # every event within the same second
    for i in range(6):
        p(Progress("report", i, 5, "figure groups", 0.0))
    out.write("summary\n")
    p.close()
    assert out.getvalue().splitlines() == ["report 0 of 5 figure groups", "report 5 of 5 figure groups", "summary"]


def test_a_sensitivity_error_needs_the_sensitivity(capsys):
    for command in ("calibrate", "run"):
        assert main([command, "--invols-std", "1.5"]) == 2
        err = capsys.readouterr().err.strip()
        assert "give --invols too" in err and len(err.splitlines()) == 1


def test_calibration_options_carry_the_sensitivity_error():
    from assistant.cli.cmd_run import calibration_settings
    from assistant.cli.parser import build_parser

    args = build_parser().parse_args(["calibrate", "--invols", "50", "--invols-std", "1.5"])
    s = calibration_settings(args)
    assert (s.invols_m_per_v, s.invols_std_m_per_v) == (pytest.approx(50e-9), pytest.approx(1.5e-9))
