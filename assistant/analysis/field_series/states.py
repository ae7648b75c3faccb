"""Each element's magnetisation state at each field step, with the tip's own reversals taken out and the
elements the tip switched while imaging picked out.

Sign convention: a +z element under a tip magnetised along +z is attracted (F' > 0), which reads as a negative
(dark) phase (point-probe model, Hartmann 1999, Annu. Rev. Mater. Sci. 29, 53; the project's phase sign). So with
the tip along +z an element's state is minus the sign of its contrast, and the tip's reversals flip that rule.

* Tip reversal (common practice, no source): the tip's coating reverses under the applied field, and every
  element's contrast inverts at one step while the topography stays as it was. It is told from a real reversal
  of the elements by what follows: along a branch an element can only reverse towards the field's direction,
  and the tip only towards the field it sits in. Every set of candidate steps (at least half the elements
  inverted) is tried as tip reversals; the one whose states break these rules least wins, ties going to fewer
  reversals. The tip's direction at the first step, when not given, is found the same way: both are tried.
* Tip-induced switching (common practice, no source): the tip's field adds to the applied one. An element the
  tip reversed during an image shows one state on its first lines and the other on its last ("first pass":
  the topography pass or the lift pass of an earlier line did it); if the repeat pass at the end of a line
  shows the other state than the lift pass of the same line, the lift pass did it ("lift pass"). Such an
  element's state at that step is the one it was left in.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from assistant.analysis.field_series.branches import Branch, wrong_way_transitions

MIN_Z = 3.0  # an element's contrast counts as a state when it is this many standard errors from zero
SPLIT_Z = 5.0  # each part of a split element must be this significant (rules of thumb, no source)
REPEAT_Z = 4.0
CANDIDATE_FRACTION = 0.5
_MAX_CANDIDATES = 10


@dataclass(frozen=True)
class TipSwitch:
    """An element the tip reversed while imaging step ``step``; ``during`` is "first pass" or "lift pass"."""

    element: int
    step: int
    during: str


@dataclass(frozen=True)
class StateResult:
    states: np.ndarray  # (steps, elements) +1 / -1 (0: not measurable there, e.g. drifted out of the frame)
    tip: np.ndarray  # (steps,) +1 tip along +z, -1 reversed
    reversal_steps: tuple[int, ...]
    tip_switches: tuple[TipSwitch, ...]
    determined: np.ndarray  # (steps, elements) whether the contrast itself was significant


def _carry(values: np.ndarray) -> np.ndarray:
    """Entries 0 (undetermined) take the last determined state of their element (before its first: the first).

    Carried in the elements' own frame (after the tip's reversals are taken out): an element too faint to read
    at a step keeps its magnetisation, not its contrast.
    """
    determined = values != 0
    out = values.astype(np.int8)
    index = np.where(determined, np.arange(out.shape[0])[:, None], -1)
    last = np.maximum.accumulate(index, axis=0)
    first = np.argmax(determined, axis=0)
    source = np.where(last >= 0, last, first[None, :])
    return np.where(determined.any(axis=0)[None, :], np.take_along_axis(out, source, axis=0), 0).astype(np.int8)


def column_nanmedian(a: np.ndarray) -> np.ndarray:
    """``numpy.nanmedian(a, axis=0)`` of a 2-D array, the same numbers (NaN for a column without any value, and
    no warning): the middle of each sorted column, or the half-sum of its two middle values. numpy takes a
    masked-array path for short columns, ten times slower on the few hundred steps of a field series."""
    ordered = np.sort(a, axis=0)  # NaN last
    n = np.count_nonzero(~np.isnan(a), axis=0)
    high = n // 2
    low = np.maximum(high - 1 + n % 2, 0)  # the same as high for an odd count
    cols = np.arange(a.shape[1])
    with np.errstate(invalid="ignore"):
        return np.where(n > 0, (ordered[low, cols] + ordered[high, cols]) / 2.0, np.nan)


def split_lines(line_deg: np.ndarray, line_sigma: np.ndarray, sign: np.ndarray, element: np.ndarray,
                ) -> list[tuple[int, int, int]]:
    """(element, step, contrast sign after the change) of elements whose lines change sign during an image.

    ``line_deg``/``line_sigma`` (steps, groups) per element line, ``sign`` (steps, elements) the sign of each
    element's whole contrast, ``element`` (groups,) the element of each line (lines in scan order).
    """
    found = []
    for e in np.unique(element):
        cols = np.flatnonzero(element == e)
        c, sd = line_deg[:, cols], line_sigma[:, cols]
        template = column_nanmedian(c * sign[:, e:e + 1])  # NaN for a line without any pixel: left out
        with np.errstate(invalid="ignore"):
            good = np.isfinite(template) & (np.abs(template) >= MIN_Z * column_nanmedian(sd))
        if good.sum() < 2:
            continue
        z = np.nan_to_num(c[:, good] * np.sign(template[good]) / sd[:, good])
        n = z.shape[1]
        head = np.cumsum(z, axis=1)[:, :-1]
        tail = z.sum(axis=1, keepdims=True) - head
        j = np.arange(1, n)
        z_head, z_tail = head / np.sqrt(j), tail / np.sqrt(n - j)
        strength = np.where(z_head * z_tail < 0, np.minimum(np.abs(z_head), np.abs(z_tail)), 0.0)
        best = np.argmax(strength, axis=1)
        rows = np.arange(z.shape[0])
        for k in np.flatnonzero(strength[rows, best] >= SPLIT_Z):
            found.append((int(e), int(k), int(np.sign(z_tail[k, best[k]]))))
    return found


def repeat_mismatches(line_deg: np.ndarray, line_sigma: np.ndarray, repeat_deg: np.ndarray,
                      element: np.ndarray) -> set[tuple[int, int]]:
    """(element, step) where some line's repeat pass shows the opposite significant sign to its lift pass."""
    with np.errstate(invalid="ignore"):
        strong = (np.abs(line_deg) >= REPEAT_Z * line_sigma) & (np.abs(repeat_deg) >= REPEAT_Z * line_sigma)
        flipped = strong & (np.sign(line_deg) != np.sign(repeat_deg))
    steps, groups = np.nonzero(flipped)
    return {(int(element[g]), int(k)) for k, g in zip(steps, groups)}


def _tip_series(steps: int, reversals: tuple[int, ...], start: int) -> np.ndarray:
    flips = np.zeros(steps, dtype=int)
    flips[list(reversals)] = 1
    return start * np.where(np.cumsum(flips) % 2 == 1, -1, 1)


def _reversals(observed: np.ndarray, candidates: list[int], parts: list[Branch], field: np.ndarray,
               tip_start: int) -> tuple[tuple[int, ...], float]:
    """The set of candidate steps taken as tip reversals for a tip starting along ``tip_start``, and its cost."""
    n = max(observed.shape[1], 1)
    direction = np.zeros(observed.shape[0], dtype=int)
    for b in parts:
        direction[b.start + 1: b.end + 1] = b.direction
    best, best_cost = (), np.inf
    for r in range(len(candidates) + 1):
        for chosen in itertools.combinations(candidates, r):
            tip = _tip_series(observed.shape[0], chosen, tip_start)
            # the tip turns towards the field's change and can only end up along the field it sits in
            against = sum(1 for k in chosen if tip[k] != direction[k] or np.sign(field[k]) != tip[k])
            cost = wrong_way_transitions(_carry(observed * tip[:, None]), parts) + n * against + 0.5 * r
            if cost < best_cost:
                best, best_cost = chosen, cost
    return best, best_cost


def _along_field(observed: np.ndarray, tip: np.ndarray, field: np.ndarray) -> float:
    """How far the mean state follows the field at its two extremes (positive: along it, as elements saturated
    by a large field are)."""
    states = _carry(observed * tip[:, None])
    seen = (states != 0).sum(axis=1)
    m = np.where(seen > 0, states.sum(axis=1) / np.maximum(seen, 1), 0.0)
    ends = (int(np.argmax(field)), int(np.argmin(field)))
    return float(sum(np.sign(field[k]) * m[k] for k in ends))


def resolve_tip(observed: np.ndarray, candidates: list[int], parts: list[Branch], field: np.ndarray, *,
                tip_start: int | None) -> tuple[tuple[int, ...], np.ndarray]:
    """The set of candidate steps taken as tip reversals, and the tip's direction at every step.

    ``observed`` holds each element's state as read with the tip along +z (0 where the contrast was too faint).
    ``tip_start`` the tip's direction at the first step (+1 along +z), or None: the start whose states break
    the rules least, ties going to the one whose elements point along the field at its extremes (common
    practice, no source: a field that saturates the elements leaves them along it).
    """
    steps = observed.shape[0]
    if tip_start is not None:
        best = _reversals(observed, candidates, parts, field, tip_start)[0]
        return best, _tip_series(steps, best, tip_start)
    tried = []
    for start in (1, -1):
        chosen, cost = _reversals(observed, candidates, parts, field, start)
        tip = _tip_series(steps, chosen, start)
        tried.append((cost, -_along_field(observed, tip, field), chosen, tip))
    _, _, chosen, tip = min(tried, key=lambda t: t[:2])
    return chosen, tip


def element_states(contrast_deg: np.ndarray, contrast_sigma: np.ndarray, field: np.ndarray, parts: list[Branch], *,
                   line_deg: np.ndarray, line_sigma: np.ndarray, line_element: np.ndarray,
                   repeat_line_deg: np.ndarray | None, tip_start: int | None = 1) -> StateResult:
    """States of every element at every step; see the module docstring.

    ``contrast_deg``/``contrast_sigma`` (steps, elements); ``line_*`` per element line (``contrasts`` in
    ``contrast.py``); ``repeat_line_deg`` the repeat pass's line contrasts or None; ``tip_start`` the tip's
    direction at the first step (+1 along +z; None: inferred, see :func:`resolve_tip`).
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        z = np.abs(contrast_deg) / contrast_sigma
    determined = np.isfinite(z) & (z >= MIN_Z)
    sign = np.sign(np.nan_to_num(contrast_deg)).astype(int)
    switches: dict[tuple[int, int], str] = {}
    for e, k, after in split_lines(line_deg, line_sigma, sign, line_element):
        sign[k, e] = after  # the state the element was left in
        determined[k, e] = True
        switches[(e, k)] = "first pass"
    if repeat_line_deg is not None:
        for e, k in repeat_mismatches(line_deg, line_sigma, repeat_line_deg, line_element):
            switches[(e, k)] = "lift pass"
    observed = np.where(determined, -sign, 0).astype(np.int8)  # the state if the tip points along +z
    both = determined[1:] & determined[:-1]
    inverted = (observed[1:] != observed[:-1]) & both
    with np.errstate(invalid="ignore", divide="ignore"):
        fraction = inverted.sum(axis=1) / both.sum(axis=1)
    candidates = [int(k) + 1 for k in np.flatnonzero(np.nan_to_num(fraction) >= CANDIDATE_FRACTION)]
    if len(candidates) > _MAX_CANDIDATES:
        candidates = sorted(sorted(candidates, key=lambda k: -fraction[k - 1])[:_MAX_CANDIDATES])
    reversals, tip = resolve_tip(observed, candidates, parts, np.asarray(field, dtype=float), tip_start=tip_start)
    tip_switches = tuple(TipSwitch(e, k, during) for (e, k), during in sorted(switches.items()))
    visible = np.isfinite(contrast_deg)  # an element drifted out of the frame has no state there, not the last
    states = np.where(visible, _carry(observed * tip[:, None]), 0).astype(np.int8)
    return StateResult(states=states, tip=tip, reversal_steps=reversals,
                       tip_switches=tip_switches, determined=determined)
