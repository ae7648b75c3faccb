"""Checks before the stage moves: every setting that would make a run fail later is refused before the first
motion, with one line naming the problem.

``mfma run`` and the terminal UI call :func:`check_series_plan` (the run twice: once on the settings alone, once
with the opened controller's hard limits and capabilities); the series procedure checks the same rules again
when it starts. A plan that passes says what the scanned data will give (:attr:`SeriesPlan.sentence`), so
nothing is scanned that cannot be used.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

from assistant.errors import AssistantError
from assistant.procedures.guard import SafetyError, SafetyLimits
from assistant.procedures.series import SeriesSettings, SeriesSettingsError
from drivers.base import Capability



class PlanError(AssistantError, ValueError):
    """A setting that would make the run fail later; the message is one line naming it."""


@dataclass(frozen=True)
class SeriesPlan:
    """Settings that passed every check, and what their data will give."""

    settings: SeriesSettings
    analysis: str  # "decomposition" (three or more heights) or "imaging"
    sentence: str


def _what_it_gives(s: SeriesSettings) -> tuple[str, str]:
    from assistant.analysis.imaging import DECOMPOSITION_MIN_HEIGHTS

    n = len(s.heights_m)
    parts = []
    if s.biases_v and len(s.biases_v) >= 3:
        parts.append(f"V_cpd from {len(s.biases_v)} biases")
    elif s.biases_v:
        parts.append(f"images at {len(s.biases_v)} biases (V_cpd needs three)")
    if s.repeat_first:
        parts.append("the repeat check for a changed sample")
    extra = (", " + ", ".join(parts)) if parts else ""
    if n >= DECOMPOSITION_MIN_HEIGHTS:
        return "decomposition", (f"{n} lift heights: the decomposition into magnetic, electrostatic and short-range "
                                 f"parts and a recommended lift height{extra}.")
    return "imaging", (f"{n} lift height{'s' if n > 1 else ''}: the images, their noise against the thermal limit"
                       f"{extra}; the decomposition needs at least {DECOMPOSITION_MIN_HEIGHTS} heights.")


def check_series_plan(settings: SeriesSettings, *, limits: SafetyLimits, controller=None,
                      existing_series: Iterable[str] = (), session_label: str = "the session file",
                      approach: bool = True) -> SeriesPlan:
    """Refuse settings that would fail after the stage has moved; return what the series will give.

    Parameters
    ----------
    settings : SeriesSettings
    limits : SafetyLimits
        The software limits (bias, lift height, ...).
    controller : Controller, optional
        When given, its hard limits (Z range, scan size, bias, sample rate) and capabilities (a coarse motor
        for the approach, a bias output for any bias but 0 V) are checked too.
    existing_series : iterable of str
        Series names already in the session file the series will be written to.
    approach : bool
        The run will approach the surface itself (needs a coarse motor).

    Raises
    ------
    PlanError
        One line naming the setting and its limit.
    """
    lim = getattr(controller, "limits", None)
    try:
        settings.validate(limits, z_range_m=getattr(lim, "z_range_m", None),
                          scan_size_max_m=getattr(lim, "scan_size_max_m", None))
    except (SeriesSettingsError, SafetyError) as exc:
        raise PlanError(str(exc)) from None
    if settings.name in set(existing_series):
        raise PlanError(f"series {settings.name!r} already exists in {session_label}; choose another name "
                        f"(free: {free_series_name(existing_series)!r}) or resume it")
    biases = settings.biases_v or (settings.bias_v,)
    if controller is not None:
        if lim is not None:
            worst = max(abs(b) for b in biases)
            if worst > lim.bias_max_v:
                raise PlanError(f"tip bias {worst:g} V exceeds the controller's limit of ±{lim.bias_max_v:g} V")
            pixel_rate = settings.pixels * settings.line_rate_hz
            if pixel_rate > lim.sample_rate_max_hz:
                raise PlanError(f"{settings.pixels} pixels at {settings.line_rate_hz:g} lines/s need "
                                f"{pixel_rate:g} samples/s; the controller gives at most {lim.sample_rate_max_hz:g}")
        if any(b != 0.0 for b in biases) and not controller.has(Capability.BIAS):
            raise PlanError(f"tip biases {', '.join(f'{b:g}' for b in biases)} V need a bias output, which the "
                            "controller does not have; use --biases 0")
        if approach and not controller.has(Capability.COARSE_MOTOR):
            raise PlanError("the controller has no coarse motor, so the run cannot approach the surface itself")
    analysis, sentence = _what_it_gives(settings)
    return SeriesPlan(settings, analysis, sentence)


def free_series_name(existing: Iterable[str], base: str = "series") -> str:
    """The first of ``series1``, ``series2``, ... not among ``existing``."""
    taken = set(existing)
    n = 1
    while f"{base}{n}" in taken:
        n += 1
    return f"{base}{n}"


def series_bytes(settings: SeriesSettings) -> int:
    """At most how many bytes a lift series takes in the session file: three images (phase, amplitude, frequency
    shift) for every second pass, the repeat counted as one, and the topography, float64 per pixel."""
    return 8 * settings.lines * settings.pixels * (3 * len(settings.passes) + 1)


def field_series_bytes(settings) -> int:
    """The same for a field series: topography, phase, amplitude and repeat at every field step."""
    return 8 * settings.lines * settings.pixels * 4 * len(settings.fields_a_per_m)


def check_disk_space(need_bytes: float, folder, *, free_bytes: int | None = None) -> None:
    """Refuse a series the disk under ``folder`` cannot hold (with a 10 % margin), before anything moves: a full
    disk halfway through stops the run with the series cut short."""
    import shutil

    from assistant.formatting import number

    need = 1.1 * need_bytes
    free = shutil.disk_usage(folder).free if free_bytes is None else free_bytes
    if need > free:
        raise PlanError(f"the series needs about {number(need / 1e9, digits=3)} GB of disk, and {folder} has "
                        f"{number(free / 1e9, digits=3)} GB free: fewer lines or pixels, or another --out folder")
