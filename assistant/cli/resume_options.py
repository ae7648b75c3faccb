"""``mfma run --resume``: options that would change what the session file planned are refused, not ignored.

A resume continues the series (or field series) stored in the file, with the calibration it stored; the options
that define a new run (``--lines``, ``--heights``, ``--thermal-seconds``, ...) have no say in it. Given with a
value other than the stored one they used to be dropped without a word, and the operator got a session other
than the one asked for; given with the stored value (the first command line repeated with ``--resume``) they
are accepted.
"""

from __future__ import annotations

import math

from assistant.cli._common import UsageError


def _heights_m(a):
    """The lift heights a new run would take [m] (None: the default)."""
    return None if a.heights is None else tuple(h * 1e-9 for h in a.heights)


# option -> how a new run would read it from the arguments, and how the stored plan holds it
_LIFT = {
    "--heights": (_heights_m, lambda s: tuple(s.heights_m)),
    "--biases": (lambda a: (tuple(a.biases), None) if len(a.biases) >= 2 else (None, a.biases[0]),
                 lambda s: (None if s.biases_v is None else tuple(s.biases_v), None if s.biases_v else s.bias_v)),
}
_FIELD = {
    "--heights": (_heights_m, lambda s: (s.lift_height_m,)),
    "--biases": (lambda a: tuple(a.biases), lambda s: (s.bias_v,)),
}
_SCAN = {
    "--lines": (lambda a: a.lines, lambda s: s.lines),
    "--pixels": (lambda a: a.pixels, lambda s: s.pixels),
    "--size-um": (lambda a: a.size_um * 1e-6, lambda s: s.scan_size_m),
    "--line-rate": (lambda a: a.line_rate, lambda s: s.line_rate_hz),
    "--no-repeat": (lambda a: not a.no_repeat, lambda s: s.repeat_first),
}
_CALIBRATION = {"--probe": "probe_name", "--length-um": "length_m", "--width-um": "width_m",
                "--temperature-k": "temperature_k", "--pressure-pa": "pressure_pa",
                "--thermal-seconds": "thermal_seconds", "--free-amplitude-nm": "free_amplitude_m",
                "--setpoint-ratio": "setpoint_ratio", "--invols": "invols_m_per_v",
                "--invols-std": "invols_std_m_per_v", "--contact-invols": "contact_invols"}


def given(option: str, argv: list[str]) -> bool:
    """Whether ``option`` is on the command line ``argv`` (also as ``--option=VALUE`` or a prefix argparse took)."""
    for token in argv:
        name = token.split("=", 1)[0]
        if name == option or (token.startswith("--") and len(name) > 3 and option.startswith(name)):
            return True
    return False


def _same(a, b) -> bool:
    if isinstance(a, tuple) and isinstance(b, tuple):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    if isinstance(a, float) or isinstance(b, float):
        return a is not None and b is not None and math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-15)
    return a == b


def changed_options(args, plan, argv: list[str]) -> list[str]:
    """The options on ``argv`` whose value differs from what the session file ``plan`` stores."""
    from assistant.cli.cmd_run import calibration_settings

    out = []
    s = plan.series
    if given("--fields-ka-per-m", argv):
        if not plan.is_field_series:
            out.append("--fields-ka-per-m")
        else:
            from assistant.procedures.field_series import parse_fields_ka_per_m

            asked = tuple(f * 1e3 for f in parse_fields_ka_per_m(args.fields_ka_per_m))
            out += [] if _same(asked, tuple(s.fields_a_per_m)) else ["--fields-ka-per-m"]
    for option, (asked, stored) in {**(_FIELD if plan.is_field_series else _LIFT), **_SCAN}.items():
        if given(option, argv) and not _same(asked(args), stored(s)):
            out.append(option)
    calibration_given = [o for o in _CALIBRATION if given(o, argv)]
    if calibration_given and plan.calibration is not None:
        asked_cal = calibration_settings(args)
        out += [o for o in calibration_given
                if not _same(getattr(asked_cal, _CALIBRATION[o]), getattr(plan.calibration, _CALIBRATION[o]))]
    elif calibration_given:
        out += calibration_given  # no stored plan to compare with: the stored drive and k are used regardless
    return out


def check_unchanged(args, plan, argv: list[str]) -> None:
    """Refuse, in one line, options given with ``--resume`` that the stored session would ignore."""
    changed = changed_options(args, plan, argv)
    if changed:
        raise UsageError(f"{', '.join(changed)}: a resume continues the session as {plan.path.name} stores it; "
                         "leave out what differs from it, or start a new run to change it")
