"""``mfma analyze thermal|sader|sweep|series``: offline analysis of recorded data."""

from __future__ import annotations

from pathlib import Path

from assistant.cli._common import UsageError, emit_json, emit_text


def _existing(path_text: str) -> Path:
    p = Path(path_text)
    if not p.is_file():
        raise UsageError(f"file not found: {p}")
    return p


def _is_hdf5(p: Path) -> bool:
    with open(p, "rb") as fh:
        return fh.read(8) == b"\x89HDF\r\n\x1a\n"


def _read_csv(p: Path):
    """A CSV with a header row, as a structured array and its column names."""
    import numpy as np

    try:
        table = np.genfromtxt(p, delimiter=",", names=True)
    except ValueError as exc:
        raise UsageError(f"{p}: not a readable CSV ({exc})") from None
    return table, table.dtype.names or ()


# ---- thermal ------------------------------------------------------------------------------------------------
def _load_record(p: Path, rate_hz: float | None):
    """A deflection record in volts and its rate from .npy or .csv (volts, or time_s,volts)."""
    import numpy as np

    if p.suffix.lower() == ".npy":
        x = np.load(p, mmap_mode="r", allow_pickle=False)
        if x.ndim != 1:
            raise UsageError(f"{p}: expected a 1-D record of volts, got shape {x.shape}")
        if rate_hz is None:
            raise UsageError(f"{p}: a .npy record needs --rate HZ")
        return x, rate_hz
    if p.suffix.lower() == ".csv":
        table, names = _read_csv(p)
        if "volts" not in names:
            raise UsageError(f"{p}: CSV needs a 'volts' column (and optionally 'time_s'), found {list(names)}")
        v = np.atleast_1d(table["volts"]).astype(float)
        if "time_s" in names:
            t = np.atleast_1d(table["time_s"]).astype(float)
            if t.size < 2 or not np.all(np.diff(t) > 0):
                raise UsageError(f"{p}: time_s must increase")
            rate_from_t = (t.size - 1) / (t[-1] - t[0])
            rate_hz = rate_hz or rate_from_t
        if rate_hz is None:
            raise UsageError(f"{p}: give --rate HZ or a time_s column")
        return v, rate_hz
    raise UsageError(f"{p}: unsupported file type {p.suffix!r} (use .npy, .csv or a session .h5)")


def thermal(args) -> int:
    from assistant.analysis import thermal as th

    p = _existing(args.file)
    invols = args.invols * 1e-9 if args.invols else None
    if _is_hdf5(p):
        result = _thermal_from_session(p, args, invols)
    else:
        volts, rate = _load_record(p, args.rate)
        result = th.analyse_thermal_record(volts, rate, temperature_k=args.temperature, invols_m_per_v=invols,
                                           k_n_per_m=args.k, detection=args.detection)
    if args.plot:
        from assistant.report.calibration_figures import thermal_figure

        thermal_figure(result, args.plot)
    d = result.to_dict()
    if args.json:
        emit_json(d)
    else:
        lines = [f"f0 = {d['f0_hz']:.2f} ± {d['f0_std_hz']:.2f} Hz", f"Q = {d['q']:.2f} ± {d['q_std']:.2f}",
                 f"peak area = {d['peak_area_v2']:.4g} V^2 (Butt-Jaschke factor {d['correction_factor']:.4f})"]
        if d["k_n_per_m"] is not None and args.invols:
            lines.append(f"k = {d['k_n_per_m']:.4g} ± {d['k_std_n_per_m']:.2g} N/m (thermal, InvOLS given)")
        if args.k:
            lines.append(f"InvOLS = {d['invols_nm_per_v']:.3f} nm/V (non-contact, from the given k)")
        if d["k_n_per_m"] is None:
            lines.append("k: give --invols NM_PER_V (or --k to get the sensitivity instead)")
        lines += [f"warning: {w}" for w in result.warnings]
        emit_text(lines)
    return 0


def _thermal_from_session(p: Path, args, invols):
    from assistant.analysis import thermal as th
    from assistant.storage.session_file import SessionFile

    with SessionFile.open(p, "r") as sf:
        cals = sf.read_calibrations()
    if not cals:
        raise UsageError(f"{p}: the session file holds no thermal spectrum")
    rec = cals[-1]
    if "spectrum_psd_v2_per_hz" not in rec.arrays:
        raise UsageError(f"{p}: the last calibration kept no spectrum")
    fit = th.fit_thermal_spectrum(rec.arrays["spectrum_frequency_hz"], rec.arrays["spectrum_psd_v2_per_hz"],
                                  averages=float(rec.scalars["spectrum_segments"]),
                                  variance_inflation=float(rec.scalars.get("spectrum_variance_inflation", 1.0)))
    return th.calibrate_thermal(fit, temperature_k=args.temperature, invols_m_per_v=invols, k_n_per_m=args.k,
                                detection=args.detection)


# ---- sader ---------------------------------------------------------------------------------------------------
def sader(args) -> int:
    from assistant.analysis.sader import sader_spring_constant

    r = sader_spring_constant(args.length_um * 1e-6, args.width_um * 1e-6, args.f0_hz, args.q,
                              temperature_k=args.temperature_k, pressure_pa=args.pressure_pa)
    d = r.to_dict()
    if args.json:
        emit_json(d)
    else:
        emit_text([f"k = {d['k_n_per_m']:.5g} ± {d['k_std_n_per_m']:.2g} N/m (Sader method)",
                   f"Reynolds number {d['reynolds']:.4g}, Gamma_i {d['gamma_imag']:.5f}",
                   f"air: {d['density_kg_m3']:.4f} kg/m^3, {d['viscosity_pa_s']:.4e} Pa s"]
                  + [f"warning: {w}" for w in r.warnings])
    return 0


# ---- sweep ----------------------------------------------------------------------------------------------------
def _load_sweep(p: Path):
    import numpy as np

    table, names = _read_csv(p)
    need = ("frequency_hz", "amplitude_v", "phase_deg")
    missing = [n for n in need if n not in names]
    if missing:
        raise UsageError(f"{p}: CSV lacks the column(s) {', '.join(missing)} (header must be "
                         f"frequency_hz,amplitude_v,phase_deg)")
    return tuple(np.atleast_1d(table[n]).astype(float) for n in need)


def sweep(args) -> int:
    from assistant.analysis.sweep import fit_drive_sweep

    f, a, ph = _load_sweep(_existing(args.file))
    r = fit_drive_sweep(f, a, ph)
    if args.plot:
        from assistant.report.calibration_figures import sweep_figure

        sweep_figure(r, args.plot)
    d = r.to_dict()
    if args.json:
        emit_json(d)
    else:
        emit_text([f"f0 = {d['f0_hz']:.2f} ± {d['f0_std_hz']:.2f} Hz", f"Q = {d['q']:.2f} ± {d['q_std']:.2f}",
                   f"phase offset {d['phase_offset_deg']:.2f} deg, amplitude at resonance "
                   f"{d['amplitude_at_resonance_v']:.4g} V"])
    return 0


# ---- series ---------------------------------------------------------------------------------------------------
def series(args) -> int:
    from assistant.procedures.analyse import analyse_npz, analyse_session_file

    p = _existing(args.file)
    _refuse_short_series(p, args.series)  # before any work: one or two heights cannot be decomposed
    if _is_hdf5(p):
        result = analyse_session_file(p, args.series, short_range_fraction=args.short_range_fraction, edge=args.edge)
    elif p.suffix.lower() == ".npz":
        result = analyse_npz(p, short_range_fraction=args.short_range_fraction, edge=args.edge)
    else:
        raise UsageError(f"{p}: expected a .npz stack or a session .h5 file")
    if args.plots:
        from assistant.report.series_figures import write_series_figures

        Path(args.plots).mkdir(parents=True, exist_ok=True)
        write_series_figures(result, Path(args.plots))
    d = result.to_dict()
    if args.json:
        emit_json(d)
    else:
        emit_text(_series_text(d))
    return 0


def _refuse_short_series(p: Path, name: str | None) -> None:
    """Exit 2 with the plain sentence when the series has fewer heights than the decomposition needs."""
    import numpy as np

    from assistant.analysis.imaging import DECOMPOSITION_MIN_HEIGHTS, decomposition_needs

    if _is_hdf5(p):
        from assistant.storage.session_file import SessionFile

        with SessionFile.open(p, "r") as sf:
            names = sf.series_names()
            if not names or (name is not None and name not in names):
                return  # the analysis names the problem
            n = sf.read_series(name or names[-1]).heights_m.size
    elif p.suffix.lower() == ".npz":
        try:
            with np.load(p, allow_pickle=False) as z:
                if "heights_nm" not in z.files:
                    return
                n = np.atleast_1d(z["heights_nm"]).size
        except (OSError, ValueError):
            return
    else:
        return
    if n < DECOMPOSITION_MIN_HEIGHTS:
        raise UsageError(f"{p}: {decomposition_needs(n)} `mfma report` shows what the series does tell "
                         "(images, noise, repeat check, V_cpd of a bias grid).")


def _series_text(d: dict) -> list[str]:
    lines = ["height_nm  magnetic_rms_deg  electrostatic_mean_deg  short_range_mean_deg"]
    es = d["electrostatic_mean_deg"]
    for i, h in enumerate(d["heights_nm"]):
        e = es[i] if not isinstance(es[i], list) else es[i][0]
        lines.append(f"{h:9.1f}  {d['magnetic_rms_deg'][i]:16.4f}  {e:22.4f}  {d['short_range_mean_deg'][i]:20.4f}")
    if d.get("edge") == "reflect" and d.get("edge_band_px"):
        lines.append(f"magnetic rms over the interior: an edge band of {d['edge_band_px']} px left out")
    lines.append(f"residual rms: {d['residual_rms_deg']} deg")
    lines.append(f"recommended lift height: {d['recommended_lift_nm']} nm")
    if d.get("cpd_v") is not None:
        lines.append(f"contact potential difference V_cpd = {d['cpd_v']:.3f} V")
    return lines
