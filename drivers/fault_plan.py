"""Fault plans: which faults a simulated set-up injects, when, and with what seeded randomness.

One plan serves three places, each applying its own kinds: the simulated stage's proxy
(:class:`simulated_stage.faults.FaultyStage`) the stage kinds, the server (:mod:`drivers.link_faults`) the link
kinds, and the session writer (a :class:`~drivers.link_faults.DiskGate`) the writing-side kind.

Kinds
-----
link level: ``link_drop`` (the link goes dead for ``duration_s``: requests arriving meanwhile are lost
    unexecuted), ``delay`` (the reply comes ``delay_s`` late), ``timeout`` (the request runs, its reply never
    comes), ``corrupt_reply`` (``flip_bytes`` bytes of the reply altered), ``truncated_reply`` (half a reply).
stage level: ``nan_reading`` (a reading or some pixels come back NaN), ``laser_loss`` (the photodetector sum
    drops and every further call fails until restored), ``z_jump`` (the Z readback and topography jump by
    ``z_jump_m``), ``error_code`` (the call fails with controller fault ``code``).
writing side: ``disk_full`` (a write fails with ``OSError(ENOSPC)``).

Each fault fires either once, on call number ``after + 1`` (counting the calls it applies to), or on every
call with ``probability``, drawn from a seeded ``numpy.random.Generator``.

A scenario's table looks like::

    [faults]
    seed = 7
    [[faults.events]]
    kind = "laser_loss"
    after = 120
    [[faults.events]]
    kind = "delay"
    probability = 0.01
    delay_s = 0.2

and a server option like ``"delay:probability=0.01:delay_s=0.2"`` or ``"error_code:after=3:methods=read+move_z"``.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from simulated_stage.errors import INJECTED_ERROR_CODE, ScenarioError  # the default code of an error_code fault

__all__ = ["Fault", "FaultPlan", "FaultPlanError", "FaultSchedule", "KINDS", "LINK_KINDS", "STAGE_KINDS",
           "WRITER_KINDS", "INJECTED_ERROR_CODE"]


class FaultPlanError(ScenarioError):
    """A fault table or option is invalid (names the key and the allowed values). A fault plan is part of a
    simulated set-up's scenario, so this is a scenario error."""


LINK_KINDS = frozenset({"link_drop", "delay", "timeout", "corrupt_reply", "truncated_reply"})
STAGE_KINDS = frozenset({"nan_reading", "laser_loss", "z_jump", "error_code"})
WRITER_KINDS = frozenset({"disk_full"})
KINDS = LINK_KINDS | STAGE_KINDS | WRITER_KINDS


@dataclass(frozen=True)
class Fault:
    """One fault of a plan. Exactly one of ``after`` and ``probability`` selects when it fires."""

    kind: str
    after: int | None = None
    probability: float = 0.0
    delay_s: float = 0.5
    duration_s: float = 1.0
    flip_bytes: int = 3
    code: int = INJECTED_ERROR_CODE
    message: str = "injected controller error"
    z_jump_m: float = 50e-9
    nan_fraction: float = 0.05
    methods: tuple[str, ...] = ()  # stage kinds: count and hit only these methods (empty: every one)

    def __post_init__(self) -> None:
        _validate(self)


_FIELDS = {f.name: f for f in dataclasses.fields(Fault)}
_RANGES: dict[str, tuple[float, float]] = {
    "after": (0, 1e12), "probability": (0.0, 1.0), "delay_s": (0.0, 600.0), "duration_s": (0.0, 600.0),
    "flip_bytes": (1, 1 << 20), "code": (-999, 32767), "z_jump_m": (-1e-5, 1e-5), "nan_fraction": (0.0, 1.0),
}


def _validate(f: Fault) -> None:
    if f.kind not in KINDS:
        raise FaultPlanError(f"faults: kind = {f.kind!r} is not one of {', '.join(sorted(KINDS))}")
    if (f.after is None) == (f.probability == 0.0):
        raise FaultPlanError(f"faults: a {f.kind} fault needs exactly one of 'after' (calls before it fires) "
                            f"or 'probability' (per call, in (0, 1])")
    for key, (lo, hi) in _RANGES.items():
        v = getattr(f, key)
        if v is None:
            continue
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or not lo <= v <= hi:
            raise FaultPlanError(f"faults: {key} = {v!r} for {f.kind} is outside [{lo:g}, {hi:g}]")
    for key in ("after", "flip_bytes", "code"):
        v = getattr(f, key)
        if v is not None and not isinstance(v, int):
            raise FaultPlanError(f"faults: {key} = {v!r} for {f.kind} must be an integer")
    if not isinstance(f.message, str) or len(f.message) > 200:
        raise FaultPlanError("faults: message must be text of at most 200 characters")
    if not isinstance(f.methods, tuple) or not all(isinstance(m, str) for m in f.methods):
        raise FaultPlanError("faults: methods must be a list of method names")


@dataclass(frozen=True)
class FaultPlan:
    """Which faults to inject and the seed of their random draws."""

    faults: tuple[Fault, ...] = ()
    seed: int = 0

    @classmethod
    def from_table(cls, table: Mapping[str, Any]) -> "FaultPlan":
        """From a scenario's ``[faults]`` table (keys ``seed`` and ``events``); unknown keys are errors."""
        if not isinstance(table, Mapping):
            raise FaultPlanError("faults: must be a table")
        unknown = set(table) - {"seed", "events"}
        if unknown:
            raise FaultPlanError(f"faults: unknown key {sorted(unknown)[0]!r} (allowed: seed, events)")
        seed = table.get("seed", 0)
        if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
            raise FaultPlanError(f"faults: seed = {seed!r} must be a non-negative integer")
        events = table.get("events", [])
        if not isinstance(events, list):
            raise FaultPlanError("faults: events must be an array of tables")
        return cls(tuple(_fault_from_mapping(e, i) for i, e in enumerate(events)), seed)

    @classmethod
    def from_specs(cls, specs: Iterable[str], *, seed: int = 0) -> "FaultPlan":
        """From option strings ``kind:key=value:key=value``, e.g. ``"timeout:after=5"``."""
        faults = []
        for i, spec in enumerate(specs):
            kind, *pairs = str(spec).split(":")
            entry: dict[str, Any] = {"kind": kind.strip()}
            for pair in pairs:
                key, sep, raw = pair.partition("=")
                if not sep:
                    raise FaultPlanError(f"faults: {pair!r} in {spec!r} is not key=value")
                entry[key.strip()] = _parse_value(key.strip(), raw.strip())
            faults.append(_fault_from_mapping(entry, i))
        return cls(tuple(faults), seed)

    def only(self, kinds: Iterable[str]) -> "FaultPlan":
        keep = frozenset(kinds)
        return FaultPlan(tuple(f for f in self.faults if f.kind in keep), self.seed)

    def schedule(self, kinds: Iterable[str] | None = None, *, stream: int = 0) -> "FaultSchedule":
        """A fresh runtime for the faults of ``kinds``; ``stream`` separates independent random streams."""
        plan = self if kinds is None else self.only(kinds)
        return FaultSchedule(plan.faults, np.random.default_rng([self.seed, stream]))


def _parse_value(key: str, raw: str) -> Any:
    if key in ("kind", "message"):
        return raw
    if key == "methods":  # "+" separates names (a command line may already split its list at commas)
        return tuple(m for m in raw.replace(",", "+").split("+") if m)
    try:
        return int(raw) if raw.lstrip("+-").isdigit() else float(raw)
    except ValueError as exc:
        raise FaultPlanError(f"faults: {key} = {raw!r} is not a number") from exc


def _fault_from_mapping(entry: Any, index: int) -> Fault:
    if not isinstance(entry, Mapping):
        raise FaultPlanError(f"faults: event {index} must be a table")
    unknown = set(entry) - set(_FIELDS)
    if unknown:
        raise FaultPlanError(f"faults: unknown key {sorted(unknown)[0]!r} in event {index} "
                            f"(allowed: {', '.join(_FIELDS)})")
    if "kind" not in entry:
        raise FaultPlanError(f"faults: event {index} lacks 'kind'")
    values = dict(entry)
    if "methods" in values and isinstance(values["methods"], list):
        values["methods"] = tuple(values["methods"])
    return Fault(**values)


class FaultSchedule:
    """Counts calls and says which faults fire on each; one per link or stage, not shared between them."""

    def __init__(self, faults: Sequence[Fault], rng: np.random.Generator) -> None:
        self.faults = tuple(faults)
        self.rng = rng
        self._counts = [0] * len(self.faults)
        self.fired: list[tuple[int, str]] = []  # (call number of that fault's count, kind), for reports

    def next_call(self, method: str | None = None) -> list[Fault]:
        firing = []
        for i, f in enumerate(self.faults):
            if f.methods and method not in f.methods:
                continue
            self._counts[i] += 1
            if f.after is not None:
                hit = self._counts[i] == f.after + 1
            else:
                hit = bool(self.rng.random() < f.probability)
            if hit:
                firing.append(f)
                self.fired.append((self._counts[i], f.kind))
        return firing
