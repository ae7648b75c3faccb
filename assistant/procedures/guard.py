"""The safety guard every procedure runs inside, and the software limits it enforces.

Whatever goes wrong (an exception, a cancel, Ctrl-C), the guard leaves the instrument withdrawn, with the drive
off, the bias at zero and any applied field at zero, lets the procedure save what it has, reports, and re-raises.
The software limits here sit *inside* the controller's hard limits; both are checked.
"""

from __future__ import annotations

import contextlib
import dataclasses
import math
import os
import tomllib
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

from assistant.ctrl_c import held
from assistant.errors import AssistantError
from assistant.procedures.events import Notice, Sink, null_sink


class SafetyError(AssistantError, RuntimeError):
    """A software safety limit would be crossed (the message names quantity, value and limit)."""


class LimitsFileError(AssistantError, ValueError):
    """The limits file is unreadable or names an unknown key or an impossible value."""


@dataclass(frozen=True)
class SafetyLimits:
    """Software limits with safe defaults. A lab overrides them in a TOML file (see :func:`load_limits`)."""

    bias_max_v: float = 5.0  # |tip bias|
    coarse_travel_max_m: float = 300e-6  # coarse travel allowed without finding the surface
    min_sum_v: float = 0.5  # photodetector sum below this means the laser is off the lever
    lift_height_max_m: float = 2e-6
    drive_amplitude_max_v: float = 1.0
    field_max_a_per_m: float = 2e6  # |applied field|; the magnet's own limit applies as well

    def check_bias(self, bias_v: float) -> None:
        if not abs(bias_v) <= self.bias_max_v:
            raise SafetyError(f"tip bias {bias_v:g} V exceeds the software limit of ±{self.bias_max_v:g} V")

    def check_lift(self, lift_height_m: float) -> None:
        if not 0 < lift_height_m <= self.lift_height_max_m:
            raise SafetyError(
                f"lift height {lift_height_m * 1e9:g} nm outside (0, {self.lift_height_max_m * 1e9:g}] nm"
            )

    def check_drive(self, amplitude_v: float) -> None:
        if not 0 <= amplitude_v <= self.drive_amplitude_max_v:
            raise SafetyError(
                f"drive amplitude {amplitude_v:g} V outside [0, {self.drive_amplitude_max_v:g}] V"
            )

    def check_field(self, field_a_per_m: float) -> None:
        if not abs(field_a_per_m) <= self.field_max_a_per_m:
            from assistant.formatting import quantity

            raise SafetyError(f"applied field {quantity(field_a_per_m, 'A/m')} exceeds the software limit of "
                              f"±{quantity(self.field_max_a_per_m, 'A/m')}")

    def check_sum(self, sum_v: float) -> None:
        if not sum_v >= self.min_sum_v:  # also catches NaN
            raise SafetyError(
                f"photodetector sum {sum_v:g} V is below {self.min_sum_v:g} V: the laser is not on the lever"
            )


#: keys a limits file may not set, and why: the software cannot hold the stage to them (a limit it accepted and
#: did not enforce would make a lab believe it held)
NOT_SOFTWARE_LIMITS = {
    "z_speed_max_m_per_s": "the Z speed is the controller's own (move_z takes no speed); set it in the controller "
                           "or its driver, and remove the key from this file",
}


def default_limits_path() -> Path:
    """``$MFMA_CONFIG_DIR/limits.toml`` or the user config folder's ``limits.toml``."""
    base = os.environ.get("MFMA_CONFIG_DIR")
    if base is None:
        import platformdirs

        base = platformdirs.user_config_dir("mfm-assistant")
    return Path(base) / "limits.toml"


def load_limits(path: str | os.PathLike | None = None) -> SafetyLimits:
    """Read software limits from ``path`` (or the default file if it exists); missing keys keep defaults."""
    explicit = path is not None
    p = Path(path) if explicit else default_limits_path()
    if not p.exists():
        if explicit:
            raise LimitsFileError(f"limits file {p} does not exist")
        return SafetyLimits()
    try:
        table = tomllib.loads(p.read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise LimitsFileError(f"limits file {p}: {exc}") from None
    fields = {f.name for f in dataclasses.fields(SafetyLimits)}
    for key, value in table.items():
        if key in NOT_SOFTWARE_LIMITS:
            raise LimitsFileError(f"limits file {p}: {key}: {NOT_SOFTWARE_LIMITS[key]}")
        if key not in fields:
            raise LimitsFileError(f"limits file {p}: unknown key {key!r} (known: {', '.join(sorted(fields))})")
        if not isinstance(value, (int, float)) or isinstance(value, bool) or not (value > 0 and math.isfinite(value)):
            raise LimitsFileError(f"limits file {p}: {key} must be a finite number > 0, got {value!r}")
    return SafetyLimits(**{k: float(v) for k, v in table.items()})


@contextlib.contextmanager
def safety_guard(controller, *, sink: Sink = null_sink, save: Callable[[], None] | None = None) -> Iterator[None]:
    """Run a block; on any exception (including KeyboardInterrupt and cancel) make the stage safe, save, re-raise.

    ``save`` is called after the stage is safe, so that a slow or failing save never delays the withdraw.
    """
    try:
        yield
    except BaseException as exc:
        try:
            stop_now(controller)
        except BaseException as safe_exc:  # the link may be gone: say so loudly, then carry on with the save
            sink(Notice("error", f"could not confirm a safe stage ({safe_exc}); check the instrument by hand"))
        else:
            field = ", field 0" if _has_magnet(controller) else ""
            sink(Notice("warning", f"stopped ({type(exc).__name__}: {exc}); tip withdrawn, drive off, bias 0 V{field}",
                        kind="stopped"))
        if save is not None:
            try:
                save()
            except Exception as save_exc:
                sink(Notice("error", f"could not save after the stop: {save_exc}"))
        raise


def stop_now(controller) -> None:
    """Stop whatever the controller is doing and make the stage safe: ``abort()``, which does not queue behind a
    command still running (on a link, a command the client gave up on may still run), else ``make_safe()``.

    A further Ctrl-C while this runs does not cut it short (it would leave, say, the drive on after the withdraw):
    in the main thread SIGINT is held for the duration; the stop is already what it asks for."""
    abort = getattr(controller, "abort", None)
    with held(deliver_after=False):
        (abort if callable(abort) else controller.make_safe)()


def _has_magnet(controller) -> bool:
    from drivers.base import Capability

    try:
        return bool(controller.has(Capability.APPLIED_FIELD))
    except Exception:
        return False
