"""Branches of a field sequence and the switching of each element along them.

A branch is a run of steps over which the applied field changes in one direction (repeated fields stay in
the branch). Along a branch an element may reverse once, towards the field's direction: on a descending branch
from +z (state +1) to -z (state -1). Its switching field is the field of the first step at which it is found
reversed; it switched somewhere between the field of the step before (exclusive) and that field.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Branch:
    """Steps ``start .. end`` (inclusive; ``start`` is the turning point the branch starts from)."""

    start: int
    end: int
    direction: int  # +1 ascending field, -1 descending


def branches(field: np.ndarray) -> list[Branch]:
    """The monotonic branches of a field sequence (at least two steps; a constant sequence has none)."""
    h = np.asarray(field, dtype=float)
    signs = np.sign(np.diff(h)).astype(int)
    if not signs.any():
        return []
    # a repeated field belongs to the branch it is in: carry the last direction forward (and the first back)
    step, last = [], int(signs[np.flatnonzero(signs)[0]])
    for d in signs:
        last = int(d) or last
        step.append(last)
    out, start = [], 0
    for k in range(1, len(step)):
        if step[k] != step[k - 1]:
            out.append(Branch(start, k, step[k - 1]))
            start = k
    out.append(Branch(start, len(step), step[-1]))
    return out


@dataclass(frozen=True)
class BranchSwitching:
    """Per element along one branch.

    ``step`` is the first step found reversed (-1: it did not reverse; -2: it already pointed the branch's
    way at the start, or was out of sight before it reversed, so the branch tells nothing of its switching
    field). ``low``/``high`` bound its switching
    field [A/m] (``high`` inf when it did not reverse by the branch's end: censored); for a descending branch
    they bound ``-H``, the field's magnitude against the element, so both branches give positive values for
    elements that need a reverse field.
    """

    branch: Branch
    step: np.ndarray
    low: np.ndarray
    high: np.ndarray

    @property
    def switched(self) -> np.ndarray:
        return self.step >= 0

    @property
    def in_sample(self) -> np.ndarray:
        """Elements that started against the branch's direction (switched or censored)."""
        return self.step != -2


def switching(states: np.ndarray, field: np.ndarray, branch: Branch) -> BranchSwitching:
    """Where each element (column of ``states``, +1/-1/0) reverses along ``branch`` of ``field``."""
    s = np.asarray(states)
    h = np.asarray(field, dtype=float)
    d = branch.direction
    start = s[branch.start]
    after = s[branch.start + 1: branch.end + 1]  # (steps after the turning point, elements)
    seg = after == d
    hit = seg.any(axis=0)
    first = np.argmax(seg, axis=0)
    # out of sight (state 0) at some step before the reversal, or before the branch's end without one
    unseen = np.cumsum(after == 0, axis=0) > 0
    lost = np.where(hit, unseen[first, np.arange(s.shape[1])], unseen[-1]) if after.size else np.zeros(s.shape[1], bool)
    step = np.where((start == -d) & ~lost, np.where(hit, first + branch.start + 1, -1), -2)
    # bounds of the switching field along the branch's direction, as a magnitude "against" the element
    g = d * h  # the field component that drives the reversal
    low = np.where(step >= 0, g[np.maximum(step - 1, 0)], g[branch.end])
    high = np.where(step >= 0, g[np.maximum(step, 0)], np.inf)
    low = np.where(step == -2, np.nan, low)
    high = np.where(step == -2, np.nan, high)
    return BranchSwitching(branch=branch, step=step, low=low, high=high)


def wrong_way_transitions(states: np.ndarray, parts: list[Branch]) -> int:
    """Number of reversals against the field's direction of their branch (an element moving -1 -> +1 on a
    descending branch): physically excluded for non-interacting elements without a tip field."""
    s = np.asarray(states)
    total = 0
    for b in parts:
        seg = s[b.start: b.end + 1]
        total += int(np.count_nonzero((seg[1:] == -b.direction) & (seg[:-1] != seg[1:])))
    return total
