"""Fault injection: a validated plan of scheduled or random faults, and a proxy that injects the stage-level
ones into the virtual microscope.

Kinds
-----
link level (applied by the server that exposes a controller over a link):
    ``link_drop`` (the link goes dead for ``duration_s``: requests arriving meanwhile are lost unexecuted),
    ``delay`` (the reply comes ``delay_s`` late), ``timeout`` (the request runs, its reply never comes),
    ``corrupt_reply`` (``flip_bytes`` bytes of the reply altered), ``truncated_reply`` (half a reply).
stage level (applied by :class:`FaultyStage` around the virtual microscope object):
    ``nan_reading`` (a reading or some pixels come back NaN), ``laser_loss`` (the photodetector sum drops and
    the stage reports fault :data:`LASER_LOSS_CODE` on every further call until restored), ``z_jump`` (the Z
    readback and topography jump by ``z_jump_m``, reported as fault :data:`Z_JUMP_CODE`), ``error_code`` (the
    call fails with controller fault ``code``).
writing side: ``disk_full`` (a :class:`DiskGate` raises ``OSError(ENOSPC)`` on a write).

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
import errno
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from simulated_stage.errors import ScenarioError, StageFault

LINK_KINDS = frozenset({"link_drop", "delay", "timeout", "corrupt_reply", "truncated_reply"})
STAGE_KINDS = frozenset({"nan_reading", "laser_loss", "z_jump", "error_code"})
WRITER_KINDS = frozenset({"disk_full"})
KINDS = LINK_KINDS | STAGE_KINDS | WRITER_KINDS

#: Device-specific fault codes of the virtual controller (positive, as SCPI reserves negatives).
INJECTED_ERROR_CODE = 301
LASER_LOSS_CODE = 310
Z_JUMP_CODE = 320

#: Stage methods that never fault: making the stage safe must always work.
DEFAULT_EXEMPT = frozenset({"withdraw", "drive_off", "make_safe", "status", "close", "restore_laser",
                            "set_laser_fraction", "clear_faults", "limits", "engaged"})


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
        raise ScenarioError(f"faults: kind = {f.kind!r} is not one of {', '.join(sorted(KINDS))}")
    if (f.after is None) == (f.probability == 0.0):
        raise ScenarioError(f"faults: a {f.kind} fault needs exactly one of 'after' (calls before it fires) "
                            f"or 'probability' (per call, in (0, 1])")
    for key, (lo, hi) in _RANGES.items():
        v = getattr(f, key)
        if v is None:
            continue
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or not lo <= v <= hi:
            raise ScenarioError(f"faults: {key} = {v!r} for {f.kind} is outside [{lo:g}, {hi:g}]")
    for key in ("after", "flip_bytes", "code"):
        v = getattr(f, key)
        if v is not None and not isinstance(v, int):
            raise ScenarioError(f"faults: {key} = {v!r} for {f.kind} must be an integer")
    if not isinstance(f.message, str) or len(f.message) > 200:
        raise ScenarioError("faults: message must be text of at most 200 characters")
    if not isinstance(f.methods, tuple) or not all(isinstance(m, str) for m in f.methods):
        raise ScenarioError("faults: methods must be a list of method names")


@dataclass(frozen=True)
class FaultPlan:
    """Which faults to inject and the seed of their random draws."""

    faults: tuple[Fault, ...] = ()
    seed: int = 0

    @classmethod
    def from_table(cls, table: Mapping[str, Any]) -> "FaultPlan":
        """From a scenario's ``[faults]`` table (keys ``seed`` and ``events``); unknown keys are errors."""
        if not isinstance(table, Mapping):
            raise ScenarioError("faults: must be a table")
        unknown = set(table) - {"seed", "events"}
        if unknown:
            raise ScenarioError(f"faults: unknown key {sorted(unknown)[0]!r} (allowed: seed, events)")
        seed = table.get("seed", 0)
        if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
            raise ScenarioError(f"faults: seed = {seed!r} must be a non-negative integer")
        events = table.get("events", [])
        if not isinstance(events, list):
            raise ScenarioError("faults: events must be an array of tables")
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
                    raise ScenarioError(f"faults: {pair!r} in {spec!r} is not key=value")
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
        raise ScenarioError(f"faults: {key} = {raw!r} is not a number") from exc


def _fault_from_mapping(entry: Any, index: int) -> Fault:
    if not isinstance(entry, Mapping):
        raise ScenarioError(f"faults: event {index} must be a table")
    unknown = set(entry) - set(_FIELDS)
    if unknown:
        raise ScenarioError(f"faults: unknown key {sorted(unknown)[0]!r} in event {index} "
                            f"(allowed: {', '.join(_FIELDS)})")
    if "kind" not in entry:
        raise ScenarioError(f"faults: event {index} lacks 'kind'")
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


class FaultyStage:
    """Wraps the virtual microscope object and injects the stage-level faults of a schedule into its calls.

    Only public methods are touched; attributes pass through. Methods in ``exempt`` never fault, so that
    withdrawing and switching the drive off always work. ``sum_keys``/``z_keys`` name the result entries
    (mapping keys or dataclass fields) that carry the photodetector sum and Z / topography.
    """

    def __init__(self, target: Any, schedule: FaultSchedule, *, rng: np.random.Generator | None = None,
                 exempt: Iterable[str] = DEFAULT_EXEMPT, sum_keys: Sequence[str] = ("sum_v",),
                 z_keys: Sequence[str] = ("z_m", "topography_m"), sum_drop: float = 0.02) -> None:
        self._target = target
        self._schedule = schedule
        self._rng = rng if rng is not None else schedule.rng
        self._exempt = frozenset(exempt)
        self._sum_keys = tuple(sum_keys)
        self._z_keys = tuple(z_keys)
        self._sum_drop = sum_drop
        self.laser_lost = False
        self.z_offset_m = 0.0

    def restore_laser(self) -> None:
        """The laser is realigned on the lever: sum readings and calls are normal again."""
        self.laser_lost = False
        if self._native_laser:
            self._target.set_laser_fraction(1.0)

    @property
    def _native_laser(self) -> bool:
        # A stage that models the laser itself reports the loss through its own physics.
        return callable(getattr(self._target, "set_laser_fraction", None))

    def __getattr__(self, name: str) -> Any:
        attr = getattr(self._target, name)
        if name.startswith("_") or not callable(attr) or name in self._exempt:
            return attr

        def call(*args: Any, **kwargs: Any) -> Any:
            if name in ("set_bias", "set_field") and (list(args) + list(kwargs.values()))[:1] == [0.0]:
                return attr(*args, **kwargs)  # zero bias and field are part of making the stage safe: never fault
            faults = self._schedule.next_call(name)
            for f in faults:
                if f.kind == "error_code":
                    raise StageFault(f.code, f"{f.message} (during {name})")
                if f.kind == "laser_loss":
                    self.laser_lost = True
                    if self._native_laser:
                        self._target.set_laser_fraction(self._sum_drop)
                    raise StageFault(LASER_LOSS_CODE, f"photodetector sum dropped to {self._sum_drop:g} of its "
                                                      f"value during {name}: the laser is off the lever")
            if self.laser_lost and not self._native_laser:
                raise StageFault(LASER_LOSS_CODE, f"photodetector sum dropped to {self._sum_drop:g} of its "
                                                  f"value: the laser is off the lever (during {name})")
            result = attr(*args, **kwargs)
            jumped = sum(f.z_jump_m for f in faults if f.kind == "z_jump")
            self.z_offset_m += jumped
            nan_faults = [f for f in faults if f.kind == "nan_reading"]
            if nan_faults or self.z_offset_m:
                result = self._transform(result, nan_faults[0].nan_fraction if nan_faults else None, 0)
            if jumped:
                raise StageFault(Z_JUMP_CODE, f"Z sensor jumped by {jumped * 1e9:g} nm during {name}")
            return result

        return call

    # ---- result rewriting --------------------------------------------------------------------------
    def _transform(self, obj: Any, nan_fraction: float | None, depth: int, key: str = "") -> Any:
        if depth > 4:
            return obj
        if isinstance(obj, Mapping):
            return type(obj)({k: self._transform(v, nan_fraction, depth + 1, str(k)) for k, v in obj.items()}) \
                if isinstance(obj, dict) else obj
        if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
            changes = {f.name: self._transform(getattr(obj, f.name), nan_fraction, depth + 1, f.name)
                       for f in dataclasses.fields(obj) if f.init}
            return dataclasses.replace(obj, **changes)
        if isinstance(obj, (list, tuple)) and not hasattr(obj, "_fields"):
            return type(obj)(self._transform(v, nan_fraction, depth + 1, key) for v in obj)
        is_float_array = isinstance(obj, np.ndarray) and obj.dtype.kind == "f"
        if not (is_float_array or (isinstance(obj, float))):
            return obj
        out = np.array(obj, dtype=float, copy=True) if is_float_array else float(obj)
        if key in self._z_keys and self.z_offset_m:
            out = out + self.z_offset_m
        if nan_fraction is not None and key not in self._sum_keys:
            if is_float_array and out.size:
                n = max(1, int(round(nan_fraction * out.size)))
                out = np.asarray(out)
                out.flat[self._rng.choice(out.size, size=n, replace=False)] = np.nan
            elif not is_float_array:
                out = math.nan
        return out.astype(obj.dtype) if is_float_array else out


class DiskGate:
    """The writing side's disk: call :meth:`check` before each write; a ``disk_full`` fault raises ENOSPC."""

    def __init__(self, schedule: FaultSchedule) -> None:
        self._schedule = schedule
        self.full = False

    def check(self, nbytes: int = 0) -> None:
        if any(f.kind == "disk_full" for f in self._schedule.next_call("write")):
            self.full = True
        if self.full:
            raise OSError(errno.ENOSPC, f"No space left on device (injected; write of {nbytes} bytes)")


def gate_for(plan: FaultPlan) -> DiskGate:
    """A disk gate driven by the ``disk_full`` faults of ``plan``."""
    return DiskGate(plan.schedule(WRITER_KINDS, stream=2))


__all__ = ["Fault", "FaultPlan", "FaultSchedule", "FaultyStage", "DiskGate", "gate_for", "KINDS", "LINK_KINDS",
           "STAGE_KINDS", "WRITER_KINDS", "LASER_LOSS_CODE", "Z_JUMP_CODE", "INJECTED_ERROR_CODE",
           "DEFAULT_EXEMPT"]
