"""Numbers for people: one way to write a measured value wherever a person reads it.

The command line's text output, ``summary.md``, the terminal UI and figure captions all use these helpers, so a
frequency reads ``74.9914 kHz`` everywhere, an uncertainty is always ``±`` with two significant digits, a ratio is
``2.4 ×`` and no number a person reads is in e-notation or a Python repr. JSON output never goes through here: its
keys and plain SI numbers are a contract.

Standard library only (the CLI imports it before deciding what else to load). Values come in the unit named
(normally SI: Hz, m, V, s); the helpers pick the prefix.

>>> quantity(74991.4, "Hz", std=4.7)
'74.9914 ± 0.0047 kHz'
>>> quantity(3.17749e-05, "m")
'31.77 µm'
>>> quantity(0.25547, "V")
'255.5 mV'
>>> progress_text("approach", 3.17749e-05, 3e-4, "m")
'approach 31.8 of 300 µm'
"""

from __future__ import annotations

import math
import numbers

__all__ = ["quantity", "number", "percent", "ratio", "yes_no", "duration", "progress_text", "number_list",
           "span", "unit_text", "DASH"]

DASH = "—"  # shown for a value that is unknown or not measured

_PREFIXES = {-12: "p", -9: "n", -6: "µ", -3: "m", 0: "", 3: "k", 6: "M", 9: "G"}
# Units that take an SI prefix, with the exponents allowed for each (a lift height reads in nm or µm, never in
# pm or km; a frequency in Hz, kHz or MHz, never in mHz).
_SCALED = {"Hz": (0, 3, 6, 9), "m": (-9, -6, -3, 0), "V": (-9, -6, -3, 0), "s": (-6, -3, 0),
           "N": (-12, -9, -6, -3, 0), "A": (-12, -9, -6, -3, 0), "Pa·s": (-6, -3, 0), "W": (-9, -6, -3, 0),
           "A/m": (0, 3, 6)}
_ZERO_EXPONENT = {"m": -6}
# Spellings we accept for a unit, as (factor to the base unit, base unit).
_ALIASES = {"nm": (1e-9, "m"), "um": (1e-6, "m"), "µm": (1e-6, "m"), "mm": (1e-3, "m"), "kHz": (1e3, "Hz"),
            "MHz": (1e6, "Hz"), "mV": (1e-3, "V"), "ms": (1e-3, "s"), "Pa s": (1.0, "Pa·s"), "kA/m": (1e3, "A/m")}
# How a unit is written (storage spells powers with ^; the degree sign joins the number).
_SPELLING = {"V^2/Hz": "V²/Hz", "m^2/Hz": "m²/Hz", "kg/m^3": "kg/m³", "A m^2": "A·m²", "V^2": "V²", "deg": "°",
             "um": "µm", "1": "", "pixel": "px"}
_SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def unit_text(unit: str) -> str:
    """How ``unit`` is written for a person: ``V^2/Hz`` -> ``V²/Hz``, ``deg`` -> ``°``, ``1`` -> nothing."""
    return _SPELLING.get(unit, unit)


def _finite(value) -> float | None:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _exponent(v: float) -> int:
    return math.floor(math.log10(abs(v))) if v != 0 else 0


def _fixed(v: float, decimals: int) -> str:
    text = f"{v:.{max(decimals, 0)}f}"
    return text[1:] if text.startswith("-") and not text.strip("-0.") else text  # no "-0.00"


def _significant(v: float, digits: int) -> str:
    """``v`` to ``digits`` significant digits in fixed notation, trailing zeros dropped."""
    if v == 0:
        return "0"
    decimals = digits - 1 - _exponent(v)
    if decimals <= 0:
        return f"{round(v, decimals):.0f}"
    text = f"{v:.{decimals}f}"
    short = text.rstrip("0").rstrip(".") if "." in text else text
    # trailing zeros go only when the value is exactly that (20.0 -> "20"); 74.9965 to 4 digits stays "75.00"
    return short if abs(float(short) - v) <= 1e-9 * max(abs(v), 1e-300) else text


def _with_std(v: float, s: float) -> tuple[str, str]:
    """Value and uncertainty: the uncertainty to two significant digits, the value to the same place."""
    decimals = 1 - _exponent(s)
    return _fixed(round(v, decimals), decimals), _fixed(round(s, decimals), decimals)


def _power_of_ten(v: float, digits: int) -> str:
    e = _exponent(v)
    return f"{_significant(v / 10.0 ** e, digits)} × 10{str(e).translate(_SUPERSCRIPT)}"


def number(value, std=None, *, digits: int = 4) -> str:
    """A plain number (no unit), with ``± std`` when an uncertainty is known; never e-notation.

    Numbers below 10⁻³ or from 10⁷ on are written as ``a × 10ⁿ``; a dash when the value is unknown.
    """
    v = _finite(value)
    if v is None:
        return DASH
    s = _finite(std)
    big_or_small = v != 0 and (abs(v) < 1e-3 or abs(v) >= 1e7)
    if s is None or s <= 0:
        if isinstance(value, numbers.Integral) and not isinstance(value, bool) and abs(v) < 1e7:
            return str(value)  # a count stays exact
        return _power_of_ten(v, digits) if big_or_small else _significant(v, digits)
    if big_or_small:
        e = _exponent(v)
        a, b = _with_std(v / 10.0 ** e, s / 10.0 ** e)
        return f"({a} ± {b}) × 10{str(e).translate(_SUPERSCRIPT)}"
    a, b = _with_std(v, s)
    return f"{a} ± {b}"


def _prefixed(v: float, unit: str) -> tuple[float, str]:
    """(scale, written unit) for ``v`` in base ``unit``: the prefix that puts the value in [1, 1000)."""
    allowed = _SCALED.get(unit)
    if not allowed:
        return 1.0, unit
    if v == 0:  # a zero Z reads "0 µm", not "0 m"
        e3 = _ZERO_EXPONENT.get(unit, 0)
        return 10.0 ** e3, _PREFIXES[e3] + unit
    e3 = 3 * math.floor(_exponent(v) / 3)
    e3 = min(max(e3, allowed[0]), allowed[-1])
    return 10.0 ** e3, _PREFIXES[e3] + unit


def quantity(value, unit: str, std=None, *, digits: int = 4) -> str:
    """``value`` (in ``unit``) with the SI prefix that suits it and ``± std`` when given: ``74.9914 ± 0.0047 kHz``.

    ``unit`` is a base unit (``Hz``, ``m``, ``V``, ``s``, ``N/m``, ...) or one of the spellings ``nm``, ``µm``,
    ``kHz``, ``mV``; storage spellings (``V^2/Hz``, ``deg``) are written for a person. A dash when unknown.
    """
    v = _finite(value)
    if v is None:
        return DASH
    factor, base = _ALIASES.get(unit, (1.0, unit))
    v *= factor
    s = _finite(std)
    s = None if s is None or s <= 0 else s * factor
    scale, written = _prefixed(v if v != 0 or s is None else s, base)
    exact = value if scale == 1.0 and factor == 1.0 and s is None else v / scale  # counts stay exact
    text = number(exact, None if s is None else s / scale, digits=digits)
    written = unit_text(written)
    if not written:
        return text
    return f"{text}{written}" if written == "°" else f"{text} {written}"


def percent(fraction, std=None, *, digits: int = 3) -> str:
    """A fraction as percent: ``0.0981`` -> ``9.81 %``."""
    f = _finite(fraction)
    if f is None:
        return DASH
    s = _finite(std)
    return f"{number(100 * f, None if s is None else 100 * s, digits=digits)} %"


def ratio(value, *, digits: int = 2) -> str:
    """A ratio: ``2.4 ×``."""
    v = _finite(value)
    return DASH if v is None else f"{number(v, digits=digits)} ×"


def yes_no(value) -> str:
    """``yes`` or ``no`` for a flag stored as a bool or as 1/0; a dash when unknown."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return DASH
    return "yes" if bool(value) else "no"


def duration(seconds) -> str:
    """A time span for a person: ``0.4 s``, ``12 s``, ``3 min 20 s``, ``1 h 05 min``."""
    t = _finite(seconds)
    if t is None:
        return DASH
    if t < 10:
        return f"{_significant(t, 2)} s"
    if t < 120:
        return f"{t:.0f} s"
    if t < 3600:
        m, s = divmod(round(t), 60)
        return f"{m} min {s:02d} s"
    h, m = divmod(round(t / 60), 60)
    return f"{h} h {m:02d} min"


def progress_text(what: str, done, total, unit: str) -> str:
    """``approach 31.8 of 300 µm``, ``series 8 of 16 lines``: both numbers in the prefix that suits the total."""
    d = _finite(done)
    t = _finite(total)
    factor, base = _ALIASES.get(unit, (1.0, unit))
    if base in _SCALED:
        ref = (t if t else d) or 0.0
        scale, written = _prefixed(ref * factor, base)
        d_text = DASH if d is None else _significant(d * factor / scale, 3)
        if t is None:
            return f"{what} {d_text} {written}"
        return f"{what} {d_text} of {_significant(t * factor / scale, 3)} {written}"
    d_text = DASH if d is None else (f"{d:.0f}" if float(d).is_integer() else _significant(d, 3))
    if t is None:
        return f"{what} {d_text} {unit}".rstrip()
    t_text = f"{t:.0f}" if float(t).is_integer() else _significant(t, 3)
    return f"{what} {d_text} of {t_text} {unit}".rstrip()


def number_list(values, unit: str = "", *, digits: int = 4) -> str:
    """``10, 20, 40 nm``: values that share one unit, written once at the end with the prefix that suits the
    largest of them (``[1e-6, 4.2e-6]`` m -> ``1, 4.2 µm``)."""
    values = list(values)
    factor, base = _ALIASES.get(unit, (1.0, unit))
    finite = [abs(v) * factor for v in (_finite(x) for x in values) if v is not None and v != 0]
    scale, written = _prefixed(max(finite), base) if finite and base in _SCALED else (1.0 / factor, unit)
    items = [number(v, digits=digits) if scale == 1.0 and factor == 1.0 else
             (DASH if _finite(v) is None else number(_finite(v) * factor / scale, digits=digits)) for v in values]
    written = unit_text(written)
    text = ", ".join(items)
    return f"{text}{written}" if written == "°" else (f"{text} {written}" if written else text)


def span(low, high, unit: str = "", *, digits: int = 3) -> str:
    """A range of values in one unit, written once: ``35.4–213 nm`` (an en dash between the ends)."""
    text = f"{number(low, digits=digits)}–{number(high, digits=digits)}"
    written = unit_text(unit)
    return f"{text} {written}" if written else text
