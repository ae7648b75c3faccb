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


def _read_csv(p: Path) -> tuple[dict, tuple[str, ...]]:
    """A CSV with a header row: its columns by name. A row that is not all numbers is named, never dropped."""
    import re

    import numpy as np

    header_at, header = None, None
    with open(p, encoding="utf-8", errors="replace") as fh:
        for n, line in enumerate(fh):
            if line.strip() and not line.lstrip().startswith("#"):
                header_at, header = n, line
                break
    if header is None:
        raise UsageError(f"{p}: the file is empty")
    names = tuple(t.strip() for t in header.strip().split(","))
    if any(_is_number(t) for t in names):
        raise UsageError(f"{p}: the first line must name the columns (time_s,volts or "
                         f"frequency_hz,amplitude_v,phase_deg), found numbers: {header.strip()[:60]}")
    try:
        data = np.loadtxt(p, delimiter=",", skiprows=header_at + 1, ndmin=2, comments="#")
    except ValueError as exc:
        text = str(exc)
        m = re.search(r"string '(.*)' to \w+ at row (\d+), column (\d+)", text)
        if m:
            line = _file_line(p, header_at, int(m.group(2)))
            column = names[int(m.group(3)) - 1] if int(m.group(3)) <= len(names) else m.group(3)
            what = "an empty value" if m.group(1) == "" else f"'{m.group(1)}'"
            raise UsageError(f"{p}, line {line}: {what} in column {column} is not a number") from None
        m = re.search(r"from (\d+) to (\d+) at row (\d+)", text)
        if m:
            raise UsageError(f"{p}, line {_file_line(p, header_at, int(m.group(3)))}: {m.group(2)} values where "
                             f"the header names {len(names)} columns") from None
        raise UsageError(f"{p}: not a readable CSV ({text})") from None
    if data.size and data.shape[1] != len(names):
        raise UsageError(f"{p}: {data.shape[1]} values per row where the header names {len(names)} columns")
    return {n: data[:, k] for k, n in enumerate(names)}, names


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _file_line(p: Path, header_at: int, row: int) -> int:
    """The 1-based line number of data row ``row`` (0-based, blank and comment lines not counted)."""
    with open(p, encoding="utf-8", errors="replace") as fh:
        seen = -1
        for n, line in enumerate(fh):
            if n <= header_at or not line.strip() or line.lstrip().startswith("#"):
                continue
            seen += 1
            if seen == row:
                return n + 1
    return header_at + row + 2


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
        v = np.asarray(table["volts"], dtype=float)
        if "time_s" in names:
            t = np.asarray(table["time_s"], dtype=float)
            if t.size < 2 or not np.all(np.diff(t) > 0):
                raise UsageError(f"{p}: time_s must increase")
            rate_from_t = (t.size - 1) / (t[-1] - t[0])
            rate_hz = rate_hz or rate_from_t
        if rate_hz is None:
            raise UsageError(f"{p}: give --rate HZ or a time_s column")
        return v, rate_hz
    if p.suffix.lower() in (".h5", ".hdf5"):
        raise UsageError(f"{p} is not an HDF5 file (it lacks the HDF5 signature): give a session file written by "
                         f"mfma, a .npy record or a .csv")
    raise UsageError(f"{p}: a {p.suffix or 'file without an extension'} cannot be read here; give a .npy record, "
                     f"a .csv (volts, or time_s,volts) or a session file (.h5)")


TEMPERATURE_SOURCES = {"given": "", "session": " as the session recorded it",
                       "assumed": " assumed, ± {std:g} K in the errors: give the lever's temperature with "
                                  "--temperature-k"}


def _temperature(args, recorded=None) -> tuple[float, str]:
    """The lever's temperature [K] and where it comes from: --temperature-k, else the session's record, else the
    calibration's assumed value (a key of ``TEMPERATURE_SOURCES``)."""
    if args.temperature_k:
        return args.temperature_k, "given"
    if recorded:
        return float(recorded), "session"
    from assistant.procedures.calibrate import DEFAULT_TEMPERATURE_K

    return DEFAULT_TEMPERATURE_K, "assumed"


def _temperature_std(source: str) -> float:
    """The temperature's standard uncertainty [K] for ``source``: the calibration's, assumed or read."""
    from assistant.analysis.calibration import DEFAULT_TEMPERATURE_STD_K
    from assistant.procedures.calibrate import ASSUMED_TEMPERATURE_STD_K

    return ASSUMED_TEMPERATURE_STD_K if source == "assumed" else DEFAULT_TEMPERATURE_STD_K


def thermal(args) -> int:
    from assistant.analysis.calibration import analyse_thermal_record, calibrate_thermal

    p = _existing(args.file)
    invols = args.invols * 1e-9 if args.invols else None
    if args.k_std and not args.k:
        raise UsageError("--k-std is the uncertainty of --k: give --k too")
    if args.invols_std and not args.invols:
        raise UsageError("--invols-std is the uncertainty of --invols: give --invols too")
    known = {"invols_m_per_v": invols, "k_n_per_m": args.k, "k_std_n_per_m": args.k_std or 0.0,
             "invols_std_m_per_v": (args.invols_std or 0.0) * 1e-9}
    if _is_hdf5(p):
        result, t_source = _thermal_from_session(p, args, known)
    else:
        volts, rate = _load_record(p, args.rate)
        t_k, t_source = _temperature(args)
        fit = analyse_thermal_record(volts, rate, temperature_k=t_k, detection=args.detection,
                                     f0_guess_hz=args.f0_hz_guess).fit
        result = calibrate_thermal(fit, temperature_k=t_k, detection=args.detection,
                                   temperature_std_k=_temperature_std(t_source), **known)
    if args.plot:
        from assistant.report.calibration_figures import write_thermal_figure

        write_thermal_figure(result, _png_path(args.plot))
    d = result.to_dict()
    if args.json:
        emit_json({**d, "warnings": list(result.warnings)})
        return 0
    from assistant.formatting import number, quantity

    lines = [f"resonance f0: {quantity(d['f0_hz'], 'Hz', d['f0_std_hz'])}",
             f"quality factor Q: {number(d['q'], d['q_std'])}",
             f"thermal peak area: {quantity(d['peak_area_v2'], 'V^2')} (Butt-Jaschke factor "
             f"{number(d['correction_factor'])}, {args.detection} detection, {quantity(d['temperature_k'], 'K')}"
             f"{TEMPERATURE_SOURCES[t_source].format(std=_temperature_std(t_source))})"]
    if args.invols:
        source = "" if args.invols_std else "; give --invols-std for the sensitivity's own uncertainty"
        lines.append(f"spring constant k: {quantity(d['k_n_per_m'], 'N/m', d['k_std_n_per_m'])} "
                     f"(thermal, from the given sensitivity{source})")
    elif args.k:
        source = "" if args.k_std else "; give --k-std to include the uncertainty of k"
        invols = quantity(d['invols_nm_per_v'], 'nm/V', d['invols_std_nm_per_v'])
        lines.append(f"optical-lever sensitivity (InvOLS): {invols} (non-contact, from the given k{source})")
    else:
        lines.append("k or sensitivity: give --invols NM_PER_V (for k) or --k N_PER_M (for the non-contact "
                     "optical-lever sensitivity)")
    if args.plot:
        lines.append(f"figure: {_png_path(args.plot)}")
    lines += [f"warning: {w}" for w in result.warnings]
    emit_text(lines)
    return 0


def _png_path(text: str) -> Path:
    p = Path(text)
    if p.suffix.lower() != ".png":
        raise UsageError(f"--plot {text}: the figure is written as PNG; give a file name ending in .png")
    if not p.parent.exists():
        raise UsageError(f"--plot {text}: the folder {p.parent} does not exist")
    return p


def _thermal_from_session(p: Path, args, known: dict):
    from assistant.analysis.calibration import calibrate_thermal
    from assistant.procedures.analyse import stored_thermal_fit
    from assistant.storage import SessionFile

    with SessionFile.open(p, "r") as sf:
        cals = sf.read_calibrations()
    if not cals:
        raise UsageError(f"{p}: the session file holds no calibration, so no thermal spectrum")
    rec = cals[-1]
    if "spectrum_psd_v2_per_hz" not in rec.arrays:
        raise UsageError(f"{p}: the last calibration kept no thermal spectrum")
    t_k, source = _temperature(args, rec.scalars.get("temperature_k"))
    fit = stored_thermal_fit(rec, f0_guess_hz=args.f0_hz_guess)
    t_std = rec.scalars.get("temperature_std_k") if source == "session" else None  # an assumed one was kept wider
    return calibrate_thermal(fit, temperature_k=t_k, detection=args.detection,
                             temperature_std_k=float(t_std or _temperature_std(source)), **known), source


# ---- sader ---------------------------------------------------------------------------------------------------
def sader(args) -> int:
    from assistant.analysis.calibration.sader import sader_spring_constant

    r = sader_spring_constant(args.length_um * 1e-6, args.width_um * 1e-6, args.f0_hz, args.q,
                              temperature_k=args.temperature_k, pressure_pa=args.pressure_pa)
    d = r.to_dict()
    if args.json:
        emit_json({**d, "warnings": list(r.warnings)})
        return 0
    from assistant.formatting import number, quantity

    emit_text([f"spring constant k: {quantity(d['k_n_per_m'], 'N/m', d['k_std_n_per_m'])} (Sader method)",
               f"Reynolds number {number(d['reynolds'])}, imaginary part of the hydrodynamic function "
               f"{number(d['gamma_imag'])}",
               f"air: density {quantity(d['density_kg_m3'], 'kg/m^3')}, viscosity "
               f"{quantity(d['viscosity_pa_s'], 'Pa s')}"]
              + [f"warning: {w}" for w in r.warnings])
    return 0


# ---- sweep ----------------------------------------------------------------------------------------------------
def _load_sweep(p: Path):
    import numpy as np

    table, names = _read_csv(p)
    need = ("frequency_hz", "amplitude_v", "phase_deg")
    missing = [n for n in need if n not in names]
    if missing:
        raise UsageError(f"{p}: the CSV lacks the column(s) {', '.join(missing)} (its header must be "
                         f"frequency_hz,amplitude_v,phase_deg)")
    return tuple(np.asarray(table[n], dtype=float) for n in need)


def sweep(args) -> int:
    from assistant.analysis.calibration.sweep import fit_drive_sweep

    f, a, ph = _load_sweep(_existing(args.file))
    r = fit_drive_sweep(f, a, ph)
    if args.plot:
        from assistant.report.calibration_figures import write_sweep_figure

        write_sweep_figure(r, _png_path(args.plot))
    d = r.to_dict()
    if args.json:
        emit_json(d)
        return 0
    from assistant.formatting import number, quantity

    lines = [f"resonance f0: {quantity(d['f0_hz'], 'Hz', d['f0_std_hz'])}",
             f"quality factor Q: {number(d['q'], d['q_std'])}",
             f"phase offset: {quantity(d['phase_offset_deg'], 'deg')}, amplitude at resonance "
             f"{quantity(d['amplitude_at_resonance_v'], 'V')}"]
    if args.plot:
        lines.append(f"figure: {_png_path(args.plot)}")
    emit_text(lines)
    return 0


# ---- series ---------------------------------------------------------------------------------------------------
def series(args) -> int:
    from assistant.cli.progress import StageProgress
    from assistant.procedures.analyse import analyse_npz, analyse_session_file

    p = _existing(args.file)
    _refuse_short_series(p, args.series)  # before any work: one or two heights cannot be decomposed
    with StageProgress() as progress:
        with progress.stage("analysis", f"decomposing {p.name}"):
            if _is_hdf5(p):
                result = analyse_session_file(p, args.series, short_range_fraction=args.short_range_fraction,
                                              edge=args.edge)
            elif p.suffix.lower() == ".npz":
                result = analyse_npz(p, short_range_fraction=args.short_range_fraction, edge=args.edge)
            elif p.suffix.lower() in (".h5", ".hdf5"):
                raise UsageError(f"{p} is not an HDF5 file (it lacks the HDF5 signature): give a session file "
                                 f"written by mfma or a .npz stack")
            else:
                raise UsageError(f"{p}: expected a .npz stack or a session file (.h5)")
        if args.plots:
            from assistant.report.series_figures import write_series_figures

            with progress.stage("figures", f"writing the figures to {args.plots}"):
                Path(args.plots).mkdir(parents=True, exist_ok=True)
                written = write_series_figures(result, Path(args.plots), per_height_scale=args.per_height_scale)
    d = result.to_dict()
    if args.json:
        emit_json(d)
    else:
        lines = series_text(d, biases_v=result.bias_v)
        if args.plots:
            lines += ["", f"figures in {args.plots}: " + ", ".join(p.name for p in written)]
        emit_text(lines)
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


def series_text(d: dict, *, biases_v=None) -> list[str]:
    """The text output of ``analyze series``: the results first, then the per-height numbers."""
    from assistant.report.results import bias_table, per_height_table, render_block, render_table, results_block

    lines = render_block(results_block(d), markdown=False) + [""]
    headers, rows, notes = per_height_table(d)
    lines += render_table(headers, rows, markdown=False) + notes
    grid = bias_table(d, biases_v)
    if grid is not None:
        lines += ["", "Electrostatic mean (°) at each tip bias:"] + render_table(*grid, markdown=False)
    if d.get("edge") == "reflect" and d.get("edge_band_px"):
        lines.append(f"Magnetic rms and residual over the interior: an edge band of {d['edge_band_px']} px "
                     f"left out.")
    if d.get("recommendation"):
        lines += ["", str(d["recommendation"])]
    return lines
