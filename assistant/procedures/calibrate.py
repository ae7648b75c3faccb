"""Probe calibration at session start, without touching the surface unless asked.

Order: thermal record of the free lever (finds f0 and Q with no prior knowledge), a drive sweep around that
peak (f0, Q and phase offset of the driven lever), the Sader method (k from plan view, f0, Q and air), then the
sensitivity. Which number came from where is kept with every number:

* default, non-contact: k from Sader; InvOLS from the thermal peak area and that k (Higgins et al. 2006).
  There is then only one k: the thermal spectrum was used to get InvOLS, so it cannot also check k.
* with a sensitivity the user measured (``invols_m_per_v``) or a contact force curve (``contact_invols``):
  the thermal k is independent of Sader's and the two are compared within their combined uncertainty.
"""

from __future__ import annotations

import dataclasses
import math
import time
from dataclasses import dataclass, field

import numpy as np

from assistant.analysis import calibration as cal
from assistant.errors import AssistantError
from assistant.procedures.acquire import drive_sweep, thermal_chunks
from assistant.procedures.events import CancelToken, Notice, Progress, Sink, null_sink
from assistant.procedures.guard import SafetyError, SafetyLimits, safety_guard

#: Ratio of true first-mode end displacement to the static-InvOLS reading (Butt & Jaschke 1995):
#: chi = sqrt(0.970688 / 0.817434) = 1.0897.
CHI_OPTICAL_LEVER = math.sqrt(cal.DETECTION_FACTORS["displacement"] / cal.DETECTION_FACTORS["optical-lever"])

DEFAULT_TEMPERATURE_K = 295.15  # a typical lab (22 C) when nothing better is known
# its standard uncertainty when assumed: 19-25 C spans the rooms microscopes stand in (common practice, no source);
# a read thermometer keeps the Sader module's 1 K
ASSUMED_TEMPERATURE_STD_K = 3.0

#: Lock-in readings averaged for the free amplitude and the phase reference. The reference's error is an offset
#: of every image: with 200 readings (0.023 deg on the simulated stage) one seed's default run read 0.059 deg of
#: it as a short-range part that kept every height of a weak film from qualifying; 2000 make it 0.007 deg (0.13 s
#: in-process; on a controller, as many readings of one lock-in time constant each).
REFERENCE_READS = 2000

DISAGREEMENT_CAUSES = ("plan-view dimensions (length, width) off their nominal values", "air temperature or "
                       "pressure", "laser spot not at the free end", "a damaged or contaminated lever")


class CalibrationError(AssistantError, ValueError):
    """Calibration inputs that cannot work (missing dimensions with no other route to k, bad values)."""


@dataclass(frozen=True)
class CalibrationSettings:
    probe_name: str | None = None
    length_m: float | None = None
    width_m: float | None = None
    temperature_k: float | None = None  # None: the controller's room sensor if it has one, else 295.15 K
    pressure_pa: float = 101325.0
    thermal_seconds: float = 2.0
    thermal_rate_hz: float | None = None  # default: 2 MS/s, or less if the controller cannot
    sweep_points: int = 201
    sweep_drive_v: float = 0.01
    free_amplitude_m: float = 20e-9
    setpoint_ratio: float = 0.7
    invols_m_per_v: float | None = None  # a sensitivity the user measured
    invols_std_m_per_v: float | None = None
    contact_invols: bool = False

    def validate(self) -> None:
        for name in ("pressure_pa", "thermal_seconds", "free_amplitude_m", "sweep_drive_v"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise CalibrationError(f"{name} = {v!r} must be positive")
        for name in ("temperature_k", "length_m", "width_m", "invols_m_per_v", "invols_std_m_per_v",
                     "thermal_rate_hz"):
            v = getattr(self, name)
            if v is not None and not (math.isfinite(v) and v > 0):
                raise CalibrationError(f"{name} = {v!r} must be positive")
        if not 0 < self.setpoint_ratio < 1:
            raise CalibrationError(f"setpoint ratio {self.setpoint_ratio:g} must lie between 0 and 1")
        if self.sweep_points < 21:
            raise CalibrationError(f"sweep points = {self.sweep_points} must be at least 21")


@dataclass(frozen=True)
class DriveSettings:
    """What imaging uses: drive frequency and amplitude, free amplitude, setpoint, phase reference."""

    frequency_hz: float
    amplitude_v: float
    free_amplitude_v: float
    free_amplitude_m: float
    setpoint_v: float
    setpoint_ratio: float
    phase_reference_deg: float  # lock-in phase of the free lever at the drive frequency
    phase_reference_std_deg: float | None = None  # its standard error (None: not recorded, a session from before)


@dataclass
class CalibrationResult:
    thermal: cal.ThermalResult
    sweep: object  # assistant.analysis.calibration.sweep fit result
    sader: object | None  # assistant.analysis.calibration.sader result
    k_n_per_m: float
    k_std_n_per_m: float
    k_source: str
    invols_m_per_v: float
    invols_std_m_per_v: float
    invols_source: str
    drive: DriveSettings
    thermal_k_check: dict | None = None  # independent thermal k and its comparison with Sader's
    contact: object | None = None
    notices: list[str] = field(default_factory=list)
    sweep_data: object | None = None
    temperature_std_k: float | None = None  # of the air temperature the calibration took (assumed: wider)

    def summary(self) -> dict:
        """Every headline number with its unit in the key and where it came from."""
        d = {
            "k_n_per_m": self.k_n_per_m, "k_std_n_per_m": self.k_std_n_per_m, "k_source": self.k_source,
            "f0_hz": self.thermal.f0_hz, "f0_std_hz": self.thermal.f0_std_hz,
            "q": self.thermal.q, "q_std": self.thermal.q_std,
            "invols_nm_per_v": self.invols_m_per_v * 1e9, "invols_std_nm_per_v": self.invols_std_m_per_v * 1e9,
            "invols_source": self.invols_source,
            "sweep_f0_hz": self.sweep.f0_hz, "sweep_q": self.sweep.q, "sweep_q_std": self.sweep.q_std,
            "drive_frequency_hz": self.drive.frequency_hz, "drive_amplitude_v": self.drive.amplitude_v,
            "free_amplitude_nm": self.drive.free_amplitude_m * 1e9, "free_amplitude_v": self.drive.free_amplitude_v,
            "setpoint_v": self.drive.setpoint_v, "phase_reference_deg": self.drive.phase_reference_deg,
            "phase_reference_std_deg": self.drive.phase_reference_std_deg,
            "temperature_k": self.thermal.temperature_k, "temperature_std_k": self.temperature_std_k,
        }
        if self.thermal_k_check is not None:
            d.update({f"thermal_check_{k}": v for k, v in self.thermal_k_check.items()})
        return d


def _thermal(controller, settings: CalibrationSettings, *, sink: Sink, cancel: CancelToken) -> cal.ThermalFit:
    rate = settings.thermal_rate_hz or min(2e6, controller.limits.sample_rate_max_hz)
    samples = int(round(settings.thermal_seconds * rate))
    acc = cal.WelchAccumulator(rate, cal.default_segment_length(samples))
    shown = 0.0
    t0 = time.monotonic()
    for chunk in thermal_chunks(controller, seconds=settings.thermal_seconds, rate_hz=rate, sink=sink, cancel=cancel):
        acc.add(chunk)
        seconds_in = acc.n_samples / rate
        if acc.n_segments >= 2 and (seconds_in - shown >= 0.25 * settings.thermal_seconds or acc.n_samples >= samples):
            shown = seconds_in
            spec = acc.result()
            sink(Progress("thermal spectrum", seconds_in, settings.thermal_seconds, "s", time.monotonic() - t0,
                          data={"frequency_hz": spec.frequencies_hz, "psd_v2_per_hz": spec.psd_v2_per_hz,
                                "segments": spec.n_segments}))
    spec = acc.result()
    fit = cal.fit_thermal_spectrum(spec.frequencies_hz, spec.psd_v2_per_hz, averages=spec.n_segments,
                                   variance_inflation=spec.variance_inflation, spectrum=spec)
    sink(Progress("thermal fit", 1, 1, "fit", time.monotonic() - t0,
                  data={"frequency_hz": fit.frequencies_hz, "psd_v2_per_hz": fit.psd_v2_per_hz,
                        "model_v2_per_hz": fit.model(fit.frequencies_hz), "f0_hz": fit.f0_hz, "q": fit.q}))
    return fit


def _sweep(controller, settings: CalibrationSettings, f0_hz: float, q: float, *, sink: Sink, cancel: CancelToken):
    half_width = 6.0 * f0_hz / q
    freqs = np.linspace(f0_hz - half_width, f0_hz + half_width, settings.sweep_points)
    data = drive_sweep(controller, freqs, settings.sweep_drive_v, sink=sink, cancel=cancel)
    fit = cal.fit_drive_sweep(data.frequency_hz, data.amplitude_v, data.phase_deg)
    sink(Progress("sweep fit", 1, 1, "fit", 0.0, data={"frequency_hz": data.frequency_hz,
                                                       "amplitude_v": data.amplitude_v, "phase_deg": data.phase_deg,
                                                       "f0_hz": fit.f0_hz, "q": fit.q}))
    return data, fit


def _dimensions(controller, settings: CalibrationSettings) -> tuple[float | None, float | None, str]:
    if settings.length_m and settings.width_m:
        return settings.length_m, settings.width_m, "entered"
    hint = controller.probe_hint() or {}
    length = settings.length_m or hint.get("length_m")
    width = settings.width_m or hint.get("width_m")
    return length, width, "nominal (from the controller's probe data)" if length and width else "missing"


def _check_drives(controller, settings: CalibrationSettings, limits: SafetyLimits) -> None:
    """Refuse, before anything moves, a drive the calibration would apply outside the software or the controller's
    limit: the sweep's drive (also the contact approach's); the working drive is capped by the same limits."""
    from assistant.formatting import quantity

    hard = controller.limits.drive_max_v
    if settings.sweep_drive_v > hard:
        raise SafetyError(f"calibration sweep drive {quantity(settings.sweep_drive_v, 'V')} exceeds the "
                          f"controller's drive limit {quantity(hard, 'V')}: lower the sweep drive")
    try:
        limits.check_drive(settings.sweep_drive_v)
    except SafetyError:
        raise SafetyError(f"calibration sweep drive {quantity(settings.sweep_drive_v, 'V')} exceeds the software "
                          f"drive limit {quantity(limits.drive_amplitude_max_v, 'V')} (drive_amplitude_max_v): "
                          f"lower the sweep drive") from None


def calibrate(controller, settings: CalibrationSettings, *, limits: SafetyLimits | None = None,
              sink: Sink = null_sink, cancel: CancelToken | None = None) -> CalibrationResult:
    """Run the whole calibration on a withdrawn stage. Runs inside the safety guard."""

    settings.validate()
    limits = limits or SafetyLimits()
    cancel = cancel or CancelToken()
    _check_drives(controller, settings, limits)
    notes: list[str] = []

    def note(level: str, text: str) -> None:
        notes.append(text)
        sink(Notice(level, text))

    temperature_std_k = cal.DEFAULT_TEMPERATURE_STD_K
    if settings.temperature_k is None:
        sensed = (controller.probe_hint() or {}).get("temperature_k")
        settings = dataclasses.replace(settings, temperature_k=float(sensed) if sensed else DEFAULT_TEMPERATURE_K)
        temperature_std_k = cal.DEFAULT_TEMPERATURE_STD_K if sensed else ASSUMED_TEMPERATURE_STD_K
        note("info" if sensed else "warning",
             f"air temperature {settings.temperature_k:.2f} K "
             + ("from the instrument's sensor" if sensed else
                f"assumed (± {ASSUMED_TEMPERATURE_STD_K:g} K in the errors); give the measured value "
                f"(--temperature-k)"))

    with safety_guard(controller, sink=sink):
        controller.make_safe()
        fit = _thermal(controller, settings, sink=sink, cancel=cancel)
        for w in fit.warnings:
            note("warning", f"thermal fit: {w}")
        cancel.raise_if_set()
        sweep_data, sweep_fit = _sweep(controller, settings, fit.f0_hz, fit.q, sink=sink, cancel=cancel)
        qc = cal.compare_q(sweep_fit, fit)
        if not qc.consistent:
            note("warning", f"Q from the sweep ({sweep_fit.q:.1f} ± {sweep_fit.q_std:.1f}) and from the thermal "
                            f"spectrum ({fit.q:.1f} ± {fit.q_std:.1f}) differ by {abs(qc.z_score):.1f} σ")
        else:
            note("info", f"Q: sweep {sweep_fit.q:.1f} ± {sweep_fit.q_std:.1f}, thermal {fit.q:.1f} ± "
                         f"{fit.q_std:.1f} (consistent, {abs(qc.z_score):.1f} σ)")

        length, width, dim_source = _dimensions(controller, settings)
        sader = None
        if length and width:
            sader = cal.sader_spring_constant(length_m=length, width_m=width, f0_hz=fit.f0_hz, q=fit.q,
                                              f0_std_hz=fit.f0_std_hz, q_std=fit.q_std,
                                              temperature_k=settings.temperature_k, pressure_pa=settings.pressure_pa,
                                              temperature_std_k=temperature_std_k)
            for w in sader.warnings:
                note("warning", f"Sader: {w}")
            note("info", f"Sader k = {sader.k_n_per_m:.4g} ± {sader.k_std_n_per_m:.2g} N/m "
                         f"(plan view {length * 1e6:g} × {width * 1e6:g} µm, {dim_source})")

        contact = None
        user_invols = settings.invols_m_per_v
        user_invols_std = settings.invols_std_m_per_v if settings.invols_std_m_per_v is not None else (
            0.02 * user_invols if user_invols else 0.0)  # common practice: a force-curve InvOLS is good to ~2 %
        if settings.contact_invols:
            contact = _contact_invols(controller, settings, sweep_fit, limits=limits, sink=sink, cancel=cancel)
            user_invols, user_invols_std = contact.invols_m_per_v, contact.invols_std_m_per_v
            note("warning", "contact sensitivity measured: the tip touched the surface, which wears the magnetic "
                            "coating")

        check = None
        if user_invols:
            source_inv = "force curve (contact)" if contact is not None else "entered by the user"
            thermal_k = thermal_result = cal.calibrate_thermal(fit, temperature_k=settings.temperature_k,
                                                               invols_m_per_v=user_invols,
                                                               invols_std_m_per_v=user_invols_std,
                                                               temperature_std_k=temperature_std_k)
            invols, invols_std, invols_source = user_invols, user_invols_std, source_inv
            if sader is not None:
                k, k_std, k_source = sader.k_n_per_m, sader.k_std_n_per_m, "Sader method"
                # ln(kT / kS): both use the fit's f0, Q (and kT its peak area), so they are propagated together
                diff = math.log(thermal_k.k_n_per_m / sader.k_n_per_m)
                sigma = math.sqrt(cal.sader_and_area_log_variance(fit, sader, settings.temperature_k)
                                  + (2 * user_invols_std / user_invols) ** 2)
                agree = abs(diff) <= 2 * sigma
                check = {"k_n_per_m": thermal_k.k_n_per_m, "k_std_n_per_m": thermal_k.k_std_n_per_m,
                         "difference_sigma": diff / sigma, "agree": agree}
                if agree:
                    note("info", f"independent thermal k = {thermal_k.k_n_per_m:.4g} ± {thermal_k.k_std_n_per_m:.2g}"
                                 f" N/m agrees with Sader within {abs(diff) / sigma:.1f} sigma")
                else:
                    note("warning", f"thermal k = {thermal_k.k_n_per_m:.4g} N/m and Sader k = {sader.k_n_per_m:.4g} "
                                    f"N/m disagree by {abs(diff) / sigma:.1f} sigma; usual causes: "
                                    + "; ".join(DISAGREEMENT_CAUSES))
            else:
                k, k_std, k_source = thermal_k.k_n_per_m, thermal_k.k_std_n_per_m, "thermal (with that InvOLS)"
        elif sader is not None:
            k, k_std, k_source = sader.k_n_per_m, sader.k_std_n_per_m, "Sader method"
            thermal_result = cal.calibrate_thermal(fit, temperature_k=settings.temperature_k, k_n_per_m=k,
                                                   sader=sader)
            invols, invols_std = thermal_result.invols_m_per_v, thermal_result.invols_std_m_per_v
            invols_source = "non-contact: thermal peak area with the Sader k (Higgins et al. 2006)"
            note("info", "non-contact path: k from Sader, InvOLS from the thermal spectrum — one k, no "
                         "independent second value")
        else:
            raise CalibrationError("no route to k: give the lever's plan view (--length-um, --width-um) for the "
                                   "Sader method, or a measured sensitivity (--invols) for the thermal method")

        drive = _drive_setup(controller, settings, sweep_fit, invols, limits=limits)
        from assistant.formatting import quantity

        note("info", f"drive {quantity(drive.frequency_hz, 'Hz', digits=6)} at {quantity(drive.amplitude_v, 'V')} "
                     f"for a free amplitude of {quantity(drive.free_amplitude_m, 'm', digits=3)}; setpoint "
                     f"{quantity(drive.setpoint_v, 'V')}")
        controller.drive_off()
    return CalibrationResult(thermal=thermal_result, sweep=sweep_fit, sader=sader, k_n_per_m=k, k_std_n_per_m=k_std,
                             k_source=k_source, invols_m_per_v=invols, invols_std_m_per_v=invols_std,
                             invols_source=invols_source, drive=drive, thermal_k_check=check, contact=contact,
                             notices=notes, sweep_data=sweep_data, temperature_std_k=temperature_std_k)


def _drive_setup(controller, settings: CalibrationSettings, sweep_fit, invols_m_per_v: float, *,
                 limits: SafetyLimits) -> DriveSettings:
    """Drive amplitude for the requested free amplitude, through the sweep's response and InvOLS."""

    invols_dynamic = invols_m_per_v * CHI_OPTICAL_LEVER  # volts -> true first-mode displacement
    frequency = cal.drive_frequency(sweep_fit)
    response = cal.sweep_response_v_per_v(sweep_fit, frequency, drive_amplitude_v=settings.sweep_drive_v)
    max_drive = min(limits.drive_amplitude_max_v, controller.limits.drive_max_v)
    try:
        drive_v = cal.drive_amplitude_for_free_amplitude(settings.free_amplitude_m, invols_m_per_v=invols_dynamic,
                                                         response_v_per_v=response, max_drive_v=max_drive)
    except ValueError as exc:
        raise CalibrationError(str(exc)) from None
    controller.set_drive(frequency, drive_v)
    # The phase reference is subtracted from every second pass, so its error is an offset of every image: the
    # short-range part carries it. Average many lock-in readings (each one time constant long) and keep the
    # standard error of the average, which the analysis adds to the short-range part's uncertainty.
    reads = [controller.read(["amplitude_v", "phase_deg"]) for _ in range(REFERENCE_READS)]
    free_v = float(np.mean([r["amplitude_v"] for r in reads]))
    phases = np.array([r["phase_deg"] for r in reads], dtype=float)
    phase_ref = float(np.mean(phases))
    phase_ref_std = float(np.std(phases, ddof=1) / np.sqrt(phases.size))
    return DriveSettings(frequency_hz=frequency, amplitude_v=drive_v, free_amplitude_v=free_v,
                         free_amplitude_m=free_v * invols_dynamic,
                         setpoint_v=cal.setpoint_from_ratio(free_v, settings.setpoint_ratio),
                         setpoint_ratio=settings.setpoint_ratio,
                         phase_reference_deg=phase_ref, phase_reference_std_deg=phase_ref_std)


def _contact_invols(controller, settings: CalibrationSettings, sweep_fit, *, limits: SafetyLimits, sink: Sink,
                    cancel: CancelToken):
    """Approach, take force curves on the surface, fit the contact slope, withdraw."""
    from assistant.procedures.approach import ApproachSettings, approach
    from drivers.base import Capability

    if not controller.has(Capability.FORCE_CURVE):
        raise CalibrationError("this controller cannot take force curves (force_curve capability)")
    drive_v = settings.sweep_drive_v
    controller.set_drive(sweep_fit.f0_hz, drive_v)
    free_v = controller.read(["amplitude_v"])["amplitude_v"]
    approach(controller, ApproachSettings(sweep_fit.f0_hz, drive_v, settings.setpoint_ratio * free_v, free_v),
             limits=limits, sink=sink, cancel=cancel)
    controller.set_feedback(False)
    controller.drive_off()
    z_now = controller.status().z_m
    curve = controller.force_curve(min(z_now + 150e-9, controller.limits.z_range_m), 400)
    result = cal.contact_invols(curve.z_m, curve.deflection_v, retract_z_m=curve.retract_z_m,
                                retract_deflection_v=curve.retract_deflection_v)
    controller.withdraw()
    return result
