"""``mfma drivers new NAME DIR``: a package skeleton for a lab's own controller driver.

The package has a pyproject with the entry point in group ``mfm_assistant.drivers`` (so that after
``pip install`` every command accepts ``NAME://...``), a controller class with every method of the interface
documented (units, errors, promises) and a test that runs the conformance kit at the ``signals`` level. The
class refuses everything until it is filled in: each method raises NotImplementedError saying what to write,
so the generated test lists what is left to do and never passes by accident.
"""

from __future__ import annotations

import keyword
import re
from pathlib import Path
from string import Template

from drivers.errors import ControllerError

_NAME = re.compile(r"^[a-z][a-z0-9_]{0,30}$")


class SkeletonError(ControllerError, ValueError):
    """The name or the folder cannot be used (bad input: the command line reports it as a usage error)."""


def names(name: str) -> dict[str, str]:
    if not _NAME.match(name) or keyword.iskeyword(name):
        raise SkeletonError(f"driver name {name!r} must be 1-31 lower-case letters, digits or _, starting with a "
                            f"letter (it is also the URL scheme, as in {name.lower() or 'mylab'}://)")
    cls = "".join(part.capitalize() for part in name.split("_") if part) + "Controller"
    return {"name": name, "package": f"{name}_driver", "dist": f"{name.replace('_', '-')}-mfm-driver",
            "cls": cls, "env": f"{name.upper()}_URL"}


def write_skeleton(name: str, directory: str | Path) -> list[Path]:
    """Write the skeleton into ``directory`` (created; must not exist or be empty). Returns the files."""
    n = names(name)
    root = Path(directory)
    if root.exists() and (not root.is_dir() or any(root.iterdir())):
        raise SkeletonError(f"{root} exists and is not an empty folder")
    files = {
        "pyproject.toml": PYPROJECT, "README.md": README, f"{n['package']}/__init__.py": INIT,
        f"{n['package']}/controller.py": CONTROLLER, "tests/test_conformance.py": TEST,
    }
    written = []
    for rel, template in files.items():
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(Template(template).substitute(n), encoding="utf-8")
        written.append(path)
    return written


PYPROJECT = '''[build-system]
requires = ["setuptools>=61"]
build-backend = "setuptools.build_meta"

[project]
name = "$dist"
version = "0.1.0"
description = "mfm-assistant controller driver: $name://"
requires-python = ">=3.11"
dependencies = ["mfm-assistant"]

# This line makes "$name://..." a controller URL for every mfma command once the package is installed.
[project.entry-points."mfm_assistant.drivers"]
$name = "$package:$cls"

[tool.setuptools]
packages = ["$package"]
'''

README = '''# $dist

A controller driver for mfm-assistant: `$name://ADDRESS` (written by `mfma drivers new`).

1. Fill in `$package/controller.py`: every method says what it must do, in which units, and which errors it
   raises. Until then each one refuses with NotImplementedError.
2. `pip install -e .` and `python -m pytest tests` (set `$env` to your controller's URL): the conformance
   kit runs at the `signals` level (nothing moves) and lists every promise still broken.
3. `mfma drivers check $name://ADDRESS --level motion`, then `--level engaged`: they ask before anything moves.
'''

INIT = '''"""mfm-assistant controller driver for $name://."""

from $package.controller import $cls

__all__ = ["$cls"]
'''

CONTROLLER = '''"""$cls: the mfm-assistant controller interface for your instrument, at $name://ADDRESS.

Fill in every method that raises NotImplementedError. The promises (checked by ``mfma drivers check``):

* SI units in and out (m, s, Hz, V); phase in degrees, reported as -(lag - 90 deg) plus any fixed offset.
* Check the hard ``limits`` before anything moves or is energised and raise
  ``LimitExceeded(quantity, value, low, high, unit)``; never clip. NaN and infinities are outside every limit.
* ``withdraw()`` and ``drive_off()`` always work and never raise on a stage that is already safe.
* Map your instrument's errors onto ``drivers.errors``: LinkTimeout, LinkLost, ProtocolError,
  ControllerFault(code, message), LaserLost, LimitExceeded, CapabilityMissing, Aborted.
* Declare in ``capabilities`` exactly what you implement; an undeclared optional method keeps the base
  class's version, which refuses with CapabilityMissing.
* ``abort()`` may come from another thread while a call runs: stop that call (it raises Aborted), withdraw,
  drive off, bias 0 V, and return within 200 ms (with a field on, once the magnet has ramped to 0).
"""

from __future__ import annotations

from collections.abc import Sequence
from urllib.parse import urlsplit

from drivers.base import Capability, Controller, ControllerInfo, Limits, Status
from drivers.errors import BadURL


def _todo(what: str, how: str) -> NotImplementedError:
    return NotImplementedError(f"$cls.{what} is not written yet: {how}")


class $cls(Controller):
    schemes = ("$name",)

    #: What you implement beyond the required methods; add flags as you write the optional methods below
    #: (Capability.THERMAL_RECORD, DRIVE_SWEEP, TWO_PASS_LINE, BIAS, COARSE_MOTOR, Z_SENSOR, FORCE_CURVE,
    #: FREQUENCY_SHIFT, APPLIED_FIELD). Nothing is declared until it works.
    capabilities: frozenset[Capability] = frozenset()

    def __init__(self, address: str) -> None:
        self.address = address  # open your link (serial port, socket, vendor library) here

    @classmethod
    def from_url(cls, url: str, **options: object) -> "$cls":
        """Open the controller at ``$name://ADDRESS``; raise BadURL for a malformed URL or unknown options."""
        parts = urlsplit(url)
        if parts.scheme != "$name":
            raise BadURL(f"{url!r} is not a $name:// URL")
        if options:
            raise BadURL(f"unknown options {sorted(options)} for $name://")
        return cls(parts.netloc + parts.path)

    # ---- identity ----------------------------------------------------------------------------------------
    @property
    def info(self) -> ControllerInfo:
        """Maker, model, serial number and firmware, as your controller reports them (four non-empty texts)."""
        raise _todo("info", "return ControllerInfo(maker, model, serial, firmware) as the controller reports them")

    @property
    def limits(self) -> Limits:
        """The hard limits of your instrument, in SI units: Z range [m], Z speed [m/s], |bias| [V], drive [V],
        coarse travel and step [m], scan size [m], sample rate [Hz], drive frequency [Hz]."""
        raise _todo("limits", "return Limits(z_range_m=..., ...) with your instrument's hard limits in SI units")

    # ---- signals -----------------------------------------------------------------------------------------
    def read(self, channels: Sequence[str]) -> dict[str, float]:
        """Lock-in filtered values as floats: deflection_v, sum_v, amplitude_v [V, peak], phase_deg [deg],
        z_m [m, extension towards the sample], frequency_shift_hz [Hz]; a dict with exactly the names asked."""
        raise _todo("read", "return {name: float value in SI} for each channel asked for")

    # ---- drive and lock-in -------------------------------------------------------------------------------
    def set_drive(self, frequency_hz: float, amplitude_v: float) -> None:
        """Drive the lever at ``frequency_hz`` (0 < f <= limits.frequency_max_hz) with ``amplitude_v``
        (0 <= a <= limits.drive_max_v); raise LimitExceeded outside, NaN included. Status then reports both."""
        raise _todo("set_drive", "check the limits (LimitExceeded, never clip), then drive the shake piezo")

    def drive_off(self) -> None:
        """Stop the drive. Always allowed; a second call does nothing and raises nothing."""
        raise _todo("drive_off", "switch the drive off; never raise when it is off already")

    def set_lockin_time_constant(self, seconds: float) -> None:
        """The lock-in output filter's time constant [s]; refuse values the lock-in cannot do (NaN too)."""
        raise _todo("set_lockin_time_constant", "set the lock-in time constant in seconds")

    # ---- motion ------------------------------------------------------------------------------------------
    def move_z(self, z_m: float) -> None:
        """Move the Z piezo to extension ``z_m`` [m] (0 = retracted, limits.z_range_m = fully extended) at no
        more than limits.z_speed_max_m_per_s; return when it is there. LimitExceeded outside [0, range]."""
        raise _todo("move_z", "check 0 <= z_m <= z_range_m, move at no more than the speed limit, return when done")

    def move_xy(self, x_m: float, y_m: float) -> None:
        """Move the scanner to (x, y) [m] about the centre of its range; LimitExceeded beyond it."""
        raise _todo("move_xy", "check the scan range (LimitExceeded), then move the scanner")

    def withdraw(self) -> None:
        """Feedback off and Z fully retracted. Always allowed, idempotent, never raises on a withdrawn stage."""
        raise _todo("withdraw", "switch the feedback off and retract Z fully; never raise when withdrawn already")

    # ---- feedback ----------------------------------------------------------------------------------------
    def set_feedback(self, enabled: bool, *, setpoint_v: float | None = None, p_gain: float | None = None,
                     i_gain: float | None = None) -> None:
        """Amplitude feedback on or off; None keeps the present setpoint [V, peak] or gain."""
        raise _todo("set_feedback", "switch the amplitude feedback, setting the setpoint and gains given")

    # ---- state -------------------------------------------------------------------------------------------
    def status(self) -> Status:
        """A snapshot: engaged, z_m [m], coarse_position_m [m], bias_v [V], drive_on, drive_frequency_hz,
        drive_amplitude_v, feedback_on, faults. ``status().safe`` must be True after withdraw, drive off, bias 0."""
        raise _todo("status", "return Status(...) read from the controller")

    def close(self) -> None:
        """Release the link (nothing to release until __init__ opens one)."""

    # ---- optional: declare the capability when you implement one ------------------------------------------
    # record_deflection(samples, rate_hz, *, chunk)   THERMAL_RECORD: yield float arrays of raw deflection [V]
    # sweep(frequencies_hz, amplitude_v, *, settle_s) DRIVE_SWEEP: SweepData with the frequencies asked for;
    #                                                 amplitude and frequencies within set_drive's limits
    # scan_line(spec)                                 TWO_PASS_LINE: LineData, topography_m and passes; refuse a
    #                                                 pass's bias beyond bias_max_v or lift outside [0, Z range];
    #                                                 a pass's bias for that pass only, set_bias's value after
    # set_bias(bias_v)                                BIAS: |bias| <= limits.bias_max_v, 0 V always allowed
    # step_coarse(steps)                              COARSE_MOTOR: positive steps approach the sample; refuse a
    #                                                 move past limits.coarse_travel_max_m before the motor moves
    # force_curve(z_stop_m, points)                   FORCE_CURVE: `points` values an array, Z [m] out and back;
    #                                                 refuse z_stop_m outside [0, Z range]
    # abort()                                         override when a call can take long (it must stop it)
    # set_field(field_a_per_m), read_field()          APPLIED_FIELD: ramp at no more than the limit, settle, then
    #                                                 return; 0 always allowed (make_safe() and abort() then set
    #                                                 the field to 0)
    # Every refusal is LimitExceeded (NaN and infinities included), raised before anything moves or is set.
'''

TEST = '''"""The mfm-assistant conformance kit at the ``signals`` level against $cls (nothing moves at this level).

Every failing check names a promise of the controller interface and what happened; until the class is filled
in, the failures say which method to write next. Point $env at your controller (default "$name://").
When this passes: ``mfma drivers check $name://ADDRESS --level motion`` (it asks before anything moves).
"""

import os

from drivers.conformance import run_checks

from $package import $cls

URL = os.environ.get("$env", "$name://")


def test_conformance_at_the_signals_level():
    controller = $cls.from_url(URL)
    try:
        result = run_checks(controller, level="signals", url=URL)
    finally:
        controller.close()
    todo = [f"{c.name}: {c.detail}" for c in result.checks if not c.passed]
    if result.stopped:
        todo.append(result.stopped)
    assert not todo, f"{len(result.failed())} of {len(result.checks)} checks fail; fill in:\\n  " + "\\n  ".join(todo)
'''
