"""The one entry point of the field-series analysis: a stack of two-pass images over field steps in, the loop
and the switching fields of every element out.

Steps: register every step to the first (``contrast.register_steps``); find the elements (``elements``); each
element's contrast after subtracting the image mean (``contrast``); its state at every step with the tip's
reversals taken out and the tip's own switching picked out (``states``); per branch of the field sequence
where each element switched (``branches``); the loop, the coercive field and the switching-field distribution
(``distribution``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from assistant.analysis.background import remove_plane
from assistant.analysis.field_series import contrast as ct
from assistant.analysis.field_series.branches import Branch, BranchSwitching, branches, switching
from assistant.analysis.field_series.distribution import (LoopFit, NormalFit, fit_intervals, fit_loop,
                                                          sheppard_sigma, tagawa_sigma)
from assistant.analysis.field_series.elements import ElementMap, find_elements
from assistant.analysis.field_series.record import build, flatten
from assistant.analysis.field_series.states import TipSwitch, element_states
from assistant.errors import InputError

MIN_STEPS = 3
_SATURATED = 0.9  # |M/Ms| above which a branch's start counts as saturated (rule of thumb, no source)


class LoopInputError(InputError):
    """The stack cannot be analysed as a field series (the message names the problem)."""


@dataclass(frozen=True)
class LoopAnalysis:
    """Result of :func:`analyse_loop` (fields in A/m; element indices 0-based, in ``elements.labels - 1``)."""

    field_a_per_m: np.ndarray  # (steps,)
    m_over_ms: np.ndarray  # (steps,) mean state of the elements in sight at each step
    elements: ElementMap
    states: np.ndarray  # (steps, elements) +1 along +z, -1 along -z, 0 never measurable
    contrast_deg: np.ndarray  # (steps, elements) mean phase over each element minus the image mean
    noise_deg: np.ndarray  # (steps,) pixel noise of each image
    drift_px: np.ndarray  # (steps, 2) [drow, dcol] of each step against the first
    tip: np.ndarray  # (steps,) +1 tip along +z, -1 reversed
    tip_reversal_steps: tuple[int, ...]
    tip_switches: tuple[TipSwitch, ...]
    down: BranchSwitching | None  # the major descending branch
    up: BranchSwitching | None  # the major ascending branch
    down_fit: NormalFit | None  # switching fields |H| on the descending branch
    up_fit: NormalFit | None
    coercive_a_per_m: float
    coercive_std_a_per_m: float
    sfd_sigma_a_per_m: float
    sfd_sigma_std_a_per_m: float
    sheppard_sigma_a_per_m: float
    loop_fit_down: LoopFit | None
    loop_fit_up: LoopFit | None
    tagawa_sigma_a_per_m: float
    tagawa_sigma_std_a_per_m: float
    notes: tuple[str, ...] = field(default=())
    pixel_m: tuple[float, float] | None = None  # (row, column) pixel size, when given

    @property
    def count(self) -> int:
        return self.elements.count

    def switching_fields_a_per_m(self, which: str) -> np.ndarray:
        """Per element the field of the first step found reversed on the major ``"down"`` or ``"up"`` branch
        [A/m] (NaN: it did not reverse there)."""
        b = self.down if which == "down" else self.up
        if b is None:
            return np.full(self.count, np.nan)
        return np.where(b.switched, self.field_a_per_m[np.maximum(b.step, 0)], np.nan)

    def switching_interval_a_per_m(self, which: str) -> tuple[np.ndarray, np.ndarray]:
        """Per element the field of the step before the first step found reversed on the major ``"down"`` or
        ``"up"`` branch, and that step's field [A/m]: the element switched past the first, at or before the
        second (NaN: it did not reverse there)."""
        b = self.down if which == "down" else self.up
        at = self.switching_fields_a_per_m(which)
        if b is None:
            return at.copy(), at
        return np.where(b.switched, self.field_a_per_m[np.maximum(b.step - 1, 0)], np.nan), at

    @property
    def tip_reversal_fields_a_per_m(self) -> tuple[float, ...]:
        return tuple(float(self.field_a_per_m[k]) for k in self.tip_reversal_steps)

    @property
    def tip_switched_elements(self) -> tuple[int, ...]:
        return tuple(sorted({s.element for s in self.tip_switches}))

    def to_record(self) -> tuple[dict, dict]:
        """Every field as plain scalars and arrays named by its path (:mod:`.record`); :meth:`from_record`
        rebuilds an equal result, arrays with their dtype. The session file keeps a loop analysis in this form."""
        return flatten(self)

    @classmethod
    def from_record(cls, scalars: dict, arrays: dict) -> "LoopAnalysis":
        """The result :meth:`to_record` described."""
        return build(cls, scalars, arrays)

    def to_dict(self) -> dict:
        """The ``mfma analyze loop --json`` keys (kA/m)."""
        (down_before, down), (up_before, up) = (self.switching_interval_a_per_m(w) for w in ("down", "up"))
        ka = lambda v: None if v is None or not math.isfinite(v) else float(v) / 1e3  # noqa: E731
        return {
            "dots": int(self.count),
            "coercive_field_ka_per_m": ka(self.coercive_a_per_m),
            "coercive_field_std_ka_per_m": ka(self.coercive_std_a_per_m),
            "sfd_sigma_ka_per_m": ka(self.sfd_sigma_a_per_m),
            "sfd_sigma_std_ka_per_m": ka(self.sfd_sigma_std_a_per_m),
            "tagawa_sigma_ka_per_m": ka(self.tagawa_sigma_a_per_m),
            "tagawa_sigma_std_ka_per_m": ka(self.tagawa_sigma_std_a_per_m),
            "switching_fields_ka_per_m": [[ka(d), ka(u)] for d, u in zip(down, up)],
            "switching_fields_step_before_ka_per_m": [[ka(d), ka(u)] for d, u in zip(down_before, up_before)],
            "loop_field_ka_per_m": [float(h) / 1e3 for h in self.field_a_per_m],
            "loop_m_over_ms": [float(m) for m in self.m_over_ms],
            "tip_reversals_ka_per_m": [float(h) / 1e3 for h in self.tip_reversal_fields_a_per_m],
            "tip_switched_elements": [int(e) for e in self.tip_switched_elements],
        }


def _checked(phase_deg, field_a_per_m, topography_m, repeat_phase_deg) -> tuple[np.ndarray, ...]:
    phase = np.asarray(phase_deg, dtype=float)
    if phase.ndim != 3:
        raise LoopInputError(f"phase_deg must be (fields, rows, cols), got shape {phase.shape}")
    k, rows, cols = phase.shape
    if k < MIN_STEPS:
        raise LoopInputError(f"a field series needs at least {MIN_STEPS} field steps, got {k}")
    if rows < 8 or cols < 8:
        raise LoopInputError(f"images of {rows} x {cols} pixels are too small (at least 8 x 8)")
    h = np.asarray(field_a_per_m, dtype=float)
    if h.shape != (k,):
        raise LoopInputError(f"the field axis has shape {h.shape} but the stack has {k} field steps")
    if not np.all(np.isfinite(h)):
        raise LoopInputError("the field axis holds values that are not finite")
    if not np.isfinite(phase).any():
        raise LoopInputError("the phase stack holds no finite values")
    topo = None if topography_m is None else np.asarray(topography_m, dtype=float)
    if topo is not None and topo.shape not in ((rows, cols), (k, rows, cols)):
        raise LoopInputError(f"topography_m has shape {topo.shape}; expected ({rows}, {cols}) or ({k}, {rows}, {cols})")
    rep = None if repeat_phase_deg is None else np.asarray(repeat_phase_deg, dtype=float)
    if rep is not None and rep.shape != phase.shape:
        raise LoopInputError(f"repeat_phase_deg has shape {rep.shape}, the phase stack {phase.shape}")
    return phase, h, topo, rep


def _major(parts: list[Branch], field_a_per_m: np.ndarray, direction: int) -> Branch | None:
    """The major branch of a direction: the one that starts furthest against it (the highest field for a
    descending branch)."""
    mine = [b for b in parts if b.direction == direction]
    return max(mine, key=lambda b: -direction * field_a_per_m[b.start]) if mine else None


def _combine(down: NormalFit | None, up: NormalFit | None, rho: float) -> tuple[float, float, float, float]:
    """Coercive field (mean switching field of both branches) and the spread, with their standard errors."""
    fits = [f for f in (down, up) if f is not None]
    if not fits:
        return (math.nan,) * 4
    if len(fits) == 1:
        f = fits[0]
        return f.mean, f.mean_std, f.sigma, f.sigma_std
    hc = 0.5 * (down.mean + up.mean)
    hc_std = 0.5 * math.sqrt(down.mean_std**2 + up.mean_std**2 + 2 * rho * down.mean_std * up.mean_std)
    resolved = [f for f in fits if math.isfinite(f.sigma)]
    if not resolved:
        return hc, hc_std, math.nan, math.nan
    sigma = math.sqrt(sum(f.sigma**2 for f in resolved) / len(resolved))
    sigma_std = sum(f.sigma_std for f in resolved) / len(resolved)  # the branches' spreads share their elements
    return hc, hc_std, sigma, sigma_std


def _recoils(parts: list[Branch], m: np.ndarray, up_b: Branch | None) -> list[Branch]:
    """Ascending branches that are recoil curves in the sense of Tagawa et al. 1991 (IEEE Trans. Magn. 27, 4975):
    they turn on the descending branch that came down from positive saturation, before it reached negative
    saturation (a virgin branch, from the as-grown state, is none)."""
    out = []
    for before, b in zip(parts, parts[1:]):
        if (b.direction > 0 and b is not up_b and before.direction < 0 and m[before.start] >= _SATURATED
                and m[b.start] > -_SATURATED):
            out.append(b)
    return out


def _tip_censored(b: BranchSwitching, switches: tuple[TipSwitch, ...]) -> tuple[np.ndarray, np.ndarray]:
    """Switching intervals for the fit, an element the tip reversed counted as needing more than the field of
    the step before (its own switching field lies above that plus the tip's unknown field: censored)."""
    low, high = b.low.copy(), b.high.copy()
    for s in switches:
        if b.step[s.element] == s.step:
            high[s.element] = np.inf
    return low, high


def _correlation(down: BranchSwitching | None, up: BranchSwitching | None) -> float:
    """Correlation of the elements' switching fields between the branches (1 when it cannot be estimated:
    the larger standard error)."""
    if down is None or up is None:
        return 1.0
    both = down.switched & up.switched
    if both.sum() < 3:
        return 1.0
    a, b = 0.5 * (down.low + down.high)[both], 0.5 * (up.low + up.high)[both]
    if np.std(a) == 0 or np.std(b) == 0:
        return 1.0
    return float(np.clip(np.corrcoef(a, b)[0, 1], 0.0, 1.0))


def _topography_changes(topo: np.ndarray | None, drift: np.ndarray) -> np.ndarray | None:
    """1 - correlation of each step's registered topography with the step before (None without per-step
    topography)."""
    if topo is None or topo.ndim != 3:
        return None
    flat = np.array([remove_plane(t) for t in ct.aligned(topo, drift)]).reshape(topo.shape[0], -1)
    out = np.zeros(topo.shape[0])
    for k in range(1, topo.shape[0]):
        a, b = flat[k - 1], flat[k]
        ok = np.isfinite(a) & np.isfinite(b)
        if ok.sum() > 2 and np.std(a[ok]) > 0 and np.std(b[ok]) > 0:
            out[k] = 1.0 - float(np.corrcoef(a[ok], b[ok])[0, 1])
    return out


def analyse_loop(phase_deg: np.ndarray, field_a_per_m: np.ndarray, *, topography_m: np.ndarray | None = None,
                 repeat_phase_deg: np.ndarray | None = None, tip_moment: str = "auto", min_area_px: int = 4,
                 pixel_m: float | tuple[float, float] | None = None) -> LoopAnalysis:
    """Switching fields, loop, coercive field and switching-field distribution of a field series.

    Parameters
    ----------
    phase_deg : (fields, rows, cols) second-pass phase at one lift height [deg], one image per field step.
    field_a_per_m : (fields,) applied field of each step [A/m], out of plane, +z away from the sample.
    topography_m : (rows, cols) topography of the first step, or (fields, rows, cols) one per step [m];
        optional (elements are then found in the magnetic contrast).
    repeat_phase_deg : (fields, rows, cols) the repeat pass at the end of each line [deg], optional.
    tip_moment : "up" or "down": the tip's magnetisation at the first step (along +z or -z); "auto" (default):
        the direction whose states agree best with the field (see ``states.resolve_tip``), noted when down.
    min_area_px : smallest element [pixels].
    pixel_m : pixel size [m], one spacing or (row, column); only reported (element sizes, figure axes).

    Returns
    -------
    LoopAnalysis

    Raises
    ------
    LoopInputError
        Shapes that do not match, fewer than three steps, a constant field, no elements found.

    Notes
    -----
    Methods and sources: see ``states`` (sign convention, tip reversal, tip-induced switching) and
    ``distribution`` (normal law fitted to the switching intervals, the loop of non-interacting elements,
    Sheppard's correction, Tagawa et al. 1991).
    """
    if tip_moment not in ("auto", "up", "down"):
        raise LoopInputError(f"tip_moment = {tip_moment!r} must be 'auto', 'up' or 'down'")
    pixel = None if pixel_m is None else tuple(float(p) for p in np.broadcast_to(np.asarray(pixel_m, float), (2,)))
    if pixel is not None and not all(np.isfinite(p) and p > 0 for p in pixel):
        raise LoopInputError(f"pixel_m = {pixel_m!r} must be positive")
    phase, h, topo, rep = _checked(phase_deg, field_a_per_m, topography_m, repeat_phase_deg)
    parts = branches(h)
    if not parts:
        raise LoopInputError("the applied field is the same at every step: there is no loop to analyse")
    if topo is not None and topo.ndim == 3:
        drift = ct.register_steps(np.array([remove_plane(t) for t in topo]))
    else:
        drift = ct.register_steps(ct.magnitude_images(phase))
    phase_a = ct.aligned(phase, drift)
    first_topo = None if topo is None else (topo if topo.ndim == 2 else topo[0])
    elements = find_elements(first_topo, ct.mean_magnitude(phase_a), min_area_px=min_area_px)
    if elements is None:
        raise LoopInputError("no elements found: neither the topography nor the magnetic contrast shows separate "
                             "elements")
    groups = ct.Groups.of(elements.labels)
    el_deg, el_n, line_deg, line_n = ct.contrasts(phase_a, groups)
    noise = ct.pixel_noise(phase_a)
    with np.errstate(invalid="ignore", divide="ignore"):
        el_sigma = noise[:, None] / np.sqrt(el_n)
        line_sigma = noise[:, None] / np.sqrt(line_n)
    rep_line = None if rep is None else ct.contrasts(ct.aligned(rep, drift), groups)[2]
    result = element_states(el_deg, el_sigma, h, parts, line_deg=line_deg, line_sigma=line_sigma,
                            line_element=groups.element, repeat_line_deg=rep_line,
                            tip_start={"auto": None, "up": 1, "down": -1}[tip_moment])
    states = result.states
    measurable = np.any(states != 0, axis=0)
    seen = (states != 0).sum(axis=1)
    m = np.where(seen > 0, states.sum(axis=1) / np.maximum(seen, 1), np.nan)  # over the elements in sight
    down_b, up_b = _major(parts, h, -1), _major(parts, h, +1)
    down = None if down_b is None else switching(states, h, down_b)
    up = None if up_b is None else switching(states, h, up_b)
    intervals = [_tip_censored(b, result.tip_switches) for b in (down, up) if b is not None]
    down_fit = None if down is None else fit_intervals(*intervals[0])
    up_fit = None if up is None else fit_intervals(*intervals[-1])
    hc, hc_std, sigma, sigma_std = _combine(down_fit, up_fit, _correlation(down, up))
    lows = np.concatenate([low for low, _ in intervals])
    highs = np.concatenate([high for _, high in intervals])
    fit_of = lambda b: None if b is None else fit_loop(h[b.start:b.end + 1], m[b.start:b.end + 1],  # noqa: E731
                                                       direction=b.direction)
    tagawa, tagawa_std, notes = math.nan, math.nan, []
    recoils = _recoils(parts, m, up_b)
    if up_b is not None and recoils:
        r = recoils[0]
        tagawa, tagawa_std, used = tagawa_sigma(h[up_b.start:up_b.end + 1], m[up_b.start:up_b.end + 1],
                                                h[r.start:r.end + 1], m[r.start:r.end + 1])
        notes.append(f"recoil branch from {h[r.start] / 1e3:.4g} kA/m (M/Ms = {m[r.start]:.3f}): "
                     f"interaction-corrected spread from {used} points")
    if tip_moment == "auto" and result.tip[0] < 0:
        notes.append("the tip was magnetised along -z (down) at the first step: inferred from the states, which "
                     "follow the field that way; give the tip's direction to override")
    # the elements found first (the summaries show it on a line of its own), then these, then the rest
    rest = _notes(h, m, down_b, up_b, result, elements, drift, measurable, topo, down_fit, up_fit)
    notes = rest[:1] + notes + rest[1:]
    return LoopAnalysis(
        field_a_per_m=h, m_over_ms=m, elements=elements, states=states, contrast_deg=el_deg, noise_deg=noise,
        drift_px=drift, tip=result.tip, tip_reversal_steps=result.reversal_steps, tip_switches=result.tip_switches,
        down=down, up=up, down_fit=down_fit, up_fit=up_fit, coercive_a_per_m=hc, coercive_std_a_per_m=hc_std,
        sfd_sigma_a_per_m=sigma, sfd_sigma_std_a_per_m=sigma_std, sheppard_sigma_a_per_m=sheppard_sigma(lows, highs),
        loop_fit_down=fit_of(down_b), loop_fit_up=fit_of(up_b), tagawa_sigma_a_per_m=tagawa,
        tagawa_sigma_std_a_per_m=tagawa_std, notes=tuple(notes), pixel_m=pixel)


def _notes(h, m, down_b, up_b, result, elements, drift, measurable, topo, down_fit, up_fit) -> list[str]:
    notes = [f"{elements.count} elements found in the {elements.source}, {float(np.median(elements.areas_px)):.0f} px "
             f"each (median)"]
    for b in (down_b, up_b):
        if b is not None and -b.direction * m[b.start] < _SATURATED:
            way = "descending" if b.direction < 0 else "ascending"
            notes.append(f"the {way} branch starts at M/Ms = {m[b.start]:.3f}, not saturated: elements that "
                         f"already pointed its way have no switching field there")
    for k in result.reversal_steps:
        notes.append(f"the tip reversed at {h[k] / 1e3:.4g} kA/m (step {k}): every element's contrast inverted; "
                     f"states re-referenced")
    changes = _topography_changes(topo, drift)
    if changes is not None:
        typical = float(np.median(changes[1:])) if changes.size > 1 else 0.0
        for k in result.reversal_steps:
            if changes[k] > max(5 * typical, 0.1):
                notes.append(f"the topography changed at step {k} as well: the tip itself may have changed")
    lift = [s for s in result.tip_switches if s.during == "lift pass"]
    first = [s for s in result.tip_switches if s.during == "first pass"]
    if lift:
        notes.append(f"the tip switched {len({s.element for s in lift})} element(s) during the lift pass: "
                     f"use a larger lift height")
    if first:
        notes.append(f"the tip switched {len({s.element for s in first})} element(s) while imaging them: a larger "
                     f"lift height helps if it happened in the lift passes, a lower-moment tip if in the "
                     f"topography pass")
    for label, fit in (("descending", down_fit), ("ascending", up_fit)):
        if fit is not None and not np.isfinite(fit.sigma):
            notes.append(f"on the {label} branch the elements switched within {fit.intervals} field step(s): "
                         f"the spread is not resolved; use finer steps")
    gone = measurable & np.any(result.states == 0, axis=0)
    if gone.any():
        notes.append(f"{int(gone.sum())} element(s) drifted out of the frame (or lost their contrast) for some "
                     f"steps: no state there, and no switching field on a branch they were not seen through")
    if (~measurable).any():
        notes.append(f"{int((~measurable).sum())} element(s) never showed a significant contrast")
    shift = float(np.max(np.hypot(drift[:, 0], drift[:, 1])))
    if shift >= 0.5:
        notes.append(f"drift between steps up to {shift:.3g} px, registered on the "
                     f"{'topography' if topo is not None and topo.ndim == 3 else 'magnetic contrast'}")
    return notes
