"""The stage proxy of fault injection: it wraps the virtual microscope and injects the stage-level faults of a
schedule into its calls.

Stage-level kinds: ``nan_reading`` (a reading or some pixels come back NaN), ``laser_loss`` (the photodetector
sum drops and the stage reports fault :data:`~simulated_stage.errors.LASER_LOST` on every further call until
restored), ``z_jump`` (the Z readback and topography jump by ``z_jump_m``, reported as fault
:data:`~simulated_stage.errors.Z_JUMP_CODE`), ``error_code`` (the call fails with controller fault ``code``).
The schedule says which fire on each call; the plans and their schedules, and the link and disk faults, are
not physics and live with the drivers (``drivers.fault_plan``, ``drivers.link_faults``).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable, Mapping, Sequence
from typing import Any, Protocol

import numpy as np

from simulated_stage.errors import LASER_LOST, Z_JUMP_CODE, StageFault

__all__ = ["FaultyStage", "DEFAULT_EXEMPT", "Schedule"]

#: Stage methods that never fault: making the stage safe must always work.
DEFAULT_EXEMPT = frozenset({"withdraw", "drive_off", "make_safe", "status", "close", "restore_laser",
                            "set_laser_fraction", "clear_faults", "limits", "engaged"})


class Schedule(Protocol):
    """What the proxy needs of a fault schedule: the faults firing on a call of ``method`` (each with ``kind``
    and the fields its kind uses: ``code``, ``message``, ``z_jump_m``, ``nan_fraction``) and a random
    generator for the NaN pixels."""

    rng: np.random.Generator

    def next_call(self, method: str | None = None) -> list[Any]: ...


class FaultyStage:
    """Wraps the virtual microscope object and injects the stage-level faults of a schedule into its calls.

    Only public methods are touched; attributes pass through. Methods in ``exempt`` never fault, so that
    withdrawing and switching the drive off always work. ``sum_keys``/``z_keys`` name the result entries
    (mapping keys or dataclass fields) that carry the photodetector sum and Z / topography.
    """

    def __init__(self, target: Any, schedule: Schedule, *, rng: np.random.Generator | None = None,
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
                    raise StageFault(LASER_LOST, f"photodetector sum dropped to {self._sum_drop:g} of its "
                                                      f"value during {name}: the laser is off the lever")
            if self.laser_lost and not self._native_laser:
                raise StageFault(LASER_LOST, f"photodetector sum dropped to {self._sum_drop:g} of its "
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
