"""Raw acquisitions shared by the calibration procedure and the ``acquire`` commands."""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator

import numpy as np

from assistant.errors import AssistantError
from assistant.procedures.events import CancelToken, Progress, Sink, null_sink
from assistant.procedures.guard import safety_guard
from drivers.base import Capability, SweepData
from drivers.errors import ProtocolError


class AcquisitionError(AssistantError, ValueError):
    """Acquisition settings that cannot work (named quantity, value and limit)."""


def check_thermal_settings(controller, *, seconds: float, rate_hz: float) -> int:
    """Validate a thermal record request; returns the number of samples."""
    if not seconds > 0:
        raise AcquisitionError(f"record length {seconds:g} s must be positive")
    if not rate_hz > 0:
        raise AcquisitionError(f"sample rate {rate_hz:g} Hz must be positive")
    if rate_hz > controller.limits.sample_rate_max_hz:
        raise AcquisitionError(f"sample rate {rate_hz:g} Hz exceeds the controller's maximum of "
                               f"{controller.limits.sample_rate_max_hz:g} Hz")
    hint = controller.probe_hint() or {}
    f0 = hint.get("resonance_hz")
    if f0 and rate_hz < 2 * f0:
        raise AcquisitionError(f"sample rate {rate_hz:g} Hz is below twice the nominal resonance "
                               f"({f0:g} Hz): the peak would lie beyond the Nyquist frequency")
    samples = int(round(seconds * rate_hz))
    if samples < 1024:
        raise AcquisitionError(f"{samples} samples ({seconds:g} s at {rate_hz:g} Hz) are too few; need >= 1024")
    return samples


def thermal_chunks(controller, *, seconds: float, rate_hz: float, sink: Sink = null_sink,
                   cancel: CancelToken | None = None) -> Iterator[np.ndarray]:
    """Stream the free lever's deflection (drive off, tip withdrawn) in chunks, reporting progress."""
    cancel = cancel or CancelToken()
    if not controller.has(Capability.THERMAL_RECORD):
        raise AcquisitionError("this controller cannot record the deflection at a high rate (thermal_record)")
    samples = check_thermal_settings(controller, seconds=seconds, rate_hz=rate_hz)
    t0 = time.monotonic()
    with safety_guard(controller, sink=sink):
        controller.drive_off()
        controller.withdraw()
        got = 0
        for chunk in controller.record_deflection(samples, rate_hz):
            cancel.raise_if_set()
            got += len(chunk)
            elapsed = time.monotonic() - t0
            sink(Progress("thermal record", got / rate_hz, samples / rate_hz, "s", elapsed,
                          remaining_s=elapsed * (samples - got) / got if got else None))
            yield chunk


def frequency_grid(start_hz: float, stop_hz: float, points: int) -> np.ndarray:
    if not 0 < start_hz < stop_hz:
        raise AcquisitionError(f"sweep start {start_hz:g} Hz must be positive and below stop {stop_hz:g} Hz")
    if points < 5:
        raise AcquisitionError(f"sweep points = {points} must be at least 5")
    return np.linspace(start_hz, stop_hz, int(points))


def drive_sweep(controller, frequencies_hz: np.ndarray, amplitude_v: float, *, sink: Sink = null_sink,
                cancel: CancelToken | None = None) -> SweepData:
    """Sweep the drive over ``frequencies_hz`` (natively, or point by point with ``set_drive`` + ``read``)."""
    cancel = cancel or CancelToken()
    f = np.asarray(frequencies_hz, dtype=float)
    if np.any(f > controller.limits.frequency_max_hz):
        raise AcquisitionError(f"sweep stop {f.max():g} Hz exceeds the controller's {controller.limits.frequency_max_hz:g} Hz")
    t0 = time.monotonic()
    with safety_guard(controller, sink=sink):
        controller.withdraw()
        if controller.has(Capability.DRIVE_SWEEP):
            data = controller.sweep(f, amplitude_v)
            sink(Progress("drive sweep", f.size, f.size, "points", time.monotonic() - t0))
        else:
            amp = np.empty_like(f)
            ph = np.empty_like(f)
            for i, fi in enumerate(f):
                cancel.raise_if_set()
                controller.set_drive(float(fi), amplitude_v)
                r = controller.read(["amplitude_v", "phase_deg"])
                amp[i], ph[i] = r["amplitude_v"], r["phase_deg"]
                sink(Progress("drive sweep", i + 1, f.size, "points", time.monotonic() - t0))
            data = SweepData(f, amp, ph)
        controller.drive_off()
    return data


def write_npy_stream(path, chunks: Iterator[np.ndarray], samples: int,
                     on_chunk: Callable[[np.ndarray], None] | None = None) -> int:
    """Write a 1-D float32 .npy of ``samples`` values from chunks, in constant memory. Returns samples written."""
    from numpy.lib import format as npformat

    written = 0
    with open(path, "wb") as fh:
        npformat.write_array_header_1_0(fh, {"descr": npformat.dtype_to_descr(np.dtype("<f4")),
                                             "fortran_order": False, "shape": (samples,)})
        for chunk in chunks:
            block = np.asarray(chunk, dtype="<f4")
            fh.write(block.tobytes())
            written += block.size
            if on_chunk is not None:
                on_chunk(chunk)
    if written != samples:
        raise ProtocolError(f"controller delivered {written} samples, {samples} were requested")
    return written
