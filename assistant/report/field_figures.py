"""Figures of quantitative MFM (matplotlib object API, Agg canvas): the TTF, the reference pattern, the field map.

* ``ttf.png``: the TTF's radial profile against spatial period with its uncertainty, the valid band shaded, the
  profile before the bias correction and the point-probe fit; beside it the regularised 2-D TTF (magnitude on a
  log scale, the band's two periods as circles).
* ``reference_pattern.png``: the reference image (force gradient, attractive F' > 0 dark as the trade reads
  phase images) with the walls of the refined pattern drawn over it, and the pattern itself.
* ``field_map.png``: mu0 Hz in mT on a diverging map centred on zero (red: field pointing away from the sample),
  its standard uncertainty on a sequential map, each with a colour bar in mT, the edge margin dashed.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

from assistant.analysis.constants import MU_0_N_PER_A2 as MU_0
from assistant.formatting import number, quantity, span
from assistant.report.colours import symmetric_limit
from assistant.report.images import phase_colormap, save_png

_SIGN = "z away from the sample; tip moment +z unless stated"


def _get(obj, key: str, default=None):
    """A value from a TipCalibration-like object or a stored mapping (tip file values)."""
    if isinstance(obj, dict):
        return obj.get(key, default)
    return getattr(obj, key, default)


def tip_arrays(cal) -> dict:
    """Plain arrays of a TipCalibration, in the names of the tip file (so both draw the same way)."""
    if isinstance(cal, dict):
        return cal
    t = cal.transfer
    pp = cal.point_probe
    return {"k_per_m": t.k_per_m, "ttf_n_per_a": cal.ttf_n_per_a, "ttf_unc_n_per_a": cal.ttf_unc_n_per_a,
            "ttf_raw_n_per_a": t.ttf_n_per_a, "in_band": t.in_band, "band_k_per_m": np.array(t.band_k_per_m),
            "ttf_2d_real_n_per_a": t.ttf_2d_n_per_a.real, "ttf_2d_imag_n_per_a": t.ttf_2d_n_per_a.imag,
            "dipole_a_m2": pp.moment_a_m2 if pp else np.nan, "monopole_a_m": pp.monopole_a_m if pp else np.nan,
            "offset_nm": pp.offset_m * 1e9 if pp else np.nan,
            "amplitude_nm": np.nan if cal.amplitude_m is None else cal.amplitude_m * 1e9,
            "point_probe_verdict": cal.to_dict()["point_probe_verdict"],
            "pattern": t.pattern, "initial_pattern": t.initial_pattern, "tip_moment": cal.tip_moment,
            "measurement_plane_nm": cal.plane_m * 1e9}


def ttf_figure(cal, *, pixel_m: tuple[float, float]) -> Figure:
    """Radial TTF profile with band, uncertainty and point-probe fit, and the 2-D TTF."""
    from assistant.analysis.quantitative.point_probe import point_probe_ttf

    a = tip_arrays(cal)
    k = np.asarray(a["k_per_m"], dtype=float)
    ttf, unc = np.asarray(a["ttf_n_per_a"], dtype=float), np.asarray(a["ttf_unc_n_per_a"], dtype=float)
    raw = np.asarray(a["ttf_raw_n_per_a"], dtype=float)
    lo, hi = (float(v) for v in a["band_k_per_m"])
    sign = -1.0 if str(a.get("tip_moment", "up")) == "down" else 1.0
    fig = Figure(figsize=(11.0, 4.6), layout="constrained")
    ax, ax2 = fig.subplots(1, 2, width_ratios=(1.35, 1.0))
    period = np.full(k.shape, np.nan)
    period[k > 0] = 2e9 * np.pi / k[k > 0]
    show = (k > 0) & np.isfinite(raw) & (raw * sign > 0)
    ax.axvspan(2e9 * np.pi / hi, 2e9 * np.pi / lo, color="0.9", zorder=0, label="valid band")
    ax.plot(period[show], sign * raw[show], ".", color="0.55", ms=4, label="ring fit, before bias correction")
    band = np.isfinite(ttf)
    ax.errorbar(period[band], sign * ttf[band], yerr=unc[band], fmt="o", ms=3.5, color="#1f4e8c", lw=1,
                label="TTF (bias corrected) ± uncertainty")
    if np.isfinite(a.get("dipole_a_m2", np.nan)):
        kk = np.linspace(max(lo / 2, k[1]), min(2 * hi, k.max()), 300)
        amp = a.get("amplitude_nm", np.nan)
        fit = point_probe_ttf(kk, moment_a_m2=a["dipole_a_m2"], monopole_a_m=a["monopole_a_m"],
                              offset_m=a["offset_nm"] * 1e-9, amplitude_m=None if not np.isfinite(amp) else amp * 1e-9)
        parts = [f"m = {number(a['dipole_a_m2'], digits=3)} A m²" if a["dipole_a_m2"] else "",
                 f"q = {number(a['monopole_a_m'], digits=3)} A m" if a["monopole_a_m"] else "",
                 f"δ = {quantity(a['offset_nm'], 'nm', digits=3)}"]
        ax.plot(2e9 * np.pi / kk, sign * fit, "-", color="#c0392b", lw=1.5,
                label="point probe: " + ", ".join(p for p in parts if p))
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("spatial period (nm)")
    ax.set_ylabel("|TTF| (N/A = (N/m) per (A/m))" if sign > 0 else "−TTF (N/A; tip moment down)")
    plane = quantity(float(a["measurement_plane_nm"]), "nm", digits=3)
    ax.set_title(f"Tip transfer function, measurement plane {plane}")
    ax.legend(fontsize=7.5, loc="lower left")
    ax.grid(True, which="both", color="0.85", lw=0.5)
    # 2-D map: the rfft2 half plane completed by Hermitian symmetry and centred
    half = np.asarray(a["ttf_2d_real_n_per_a"]) + 1j * np.asarray(a["ttf_2d_imag_n_per_a"])
    rows, cols = half.shape[0], 2 * (half.shape[1] - 1)
    full = np.zeros((rows, cols), complex)
    full[:, :half.shape[1]] = half
    full[:, half.shape[1]:] = np.conj(half[(-np.arange(rows)) % rows, 1:half.shape[1] - 1][:, ::-1])
    mag = np.fft.fftshift(np.abs(full))
    dky, dkx = 2 * np.pi / (rows * pixel_m[0]), 2 * np.pi / (cols * pixel_m[1])
    extent = (-cols / 2 * dkx * 1e-6, (cols / 2 - 1) * dkx * 1e-6, -rows / 2 * dky * 1e-6, (rows / 2 - 1) * dky * 1e-6)
    positive = mag[mag > 0]
    vmin = float(np.percentile(positive, 5)) if positive.size else 1e-30
    from matplotlib.colors import LogNorm

    im = ax2.imshow(np.maximum(mag, vmin), origin="lower", extent=extent, cmap="magma",
                    norm=LogNorm(vmin=vmin, vmax=float(mag.max()) if mag.max() > vmin else vmin * 10))
    t = np.linspace(0, 2 * np.pi, 200)
    for kb in (lo, hi):
        ax2.plot(kb * 1e-6 * np.cos(t), kb * 1e-6 * np.sin(t), "--", color="#7fd3ff", lw=1)
    lim = min(1.3 * hi * 1e-6, extent[1])
    ax2.set_xlim(-lim, lim)
    ax2.set_ylim(-lim, lim)
    ax2.set_xlabel("k_x (rad/µm)")
    ax2.set_ylabel("k_y (rad/µm)")
    ax2.set_title("regularised 2-D TTF |·| (GCV); band dashed")
    fig.colorbar(im, ax=ax2, label="|TTF| (N/A)", shrink=0.85)
    return fig


def pattern_figure(cal, *, gradient_n_per_m: np.ndarray, pixel_m: tuple[float, float]) -> Figure:
    """The reference image with the refined pattern's walls over it, and the pattern."""
    a = tip_arrays(cal)
    g = np.asarray(gradient_n_per_m, dtype=float) * 1e3
    g = g - g.mean()
    pattern = np.asarray(a["pattern"], dtype=float)
    initial = np.asarray(a.get("initial_pattern", pattern), dtype=float)
    rows, cols = g.shape
    extent = (0, cols * pixel_m[1] * 1e6, 0, rows * pixel_m[0] * 1e6)
    fig = Figure(figsize=(11.0, 5.0), layout="constrained")
    ax, ax2 = fig.subplots(1, 2)
    lim = symmetric_limit(g)
    im = ax.imshow(g, origin="lower", extent=extent, cmap=phase_colormap().reversed(), vmin=-lim, vmax=lim)
    yy = (np.arange(rows) + 0.5) * pixel_m[0] * 1e6
    xx = (np.arange(cols) + 0.5) * pixel_m[1] * 1e6
    ax.contour(xx, yy, initial, levels=[0.0], colors="#e67e22", linewidths=1.2)
    ax.contour(xx, yy, pattern, levels=[0.0], colors="#00a087", linewidths=0.8)
    ax.set_title("reference image; walls: refined (green), first sign (orange)", fontsize=9)
    ax.set_xlabel("x (µm)")
    ax.set_ylabel("y (µm)")
    fig.colorbar(im, ax=ax, label="F' − mean (mN/m); attractive dark", shrink=0.85)
    tip = str(a.get("tip_moment", "up"))
    im2 = ax2.imshow(pattern, origin="lower", extent=extent, cmap="gray", vmin=-1, vmax=1)
    ax2.set_title(f"s = M/Ms: +Ms (white) where the tip is {'attracted' if tip == 'up' else 'repelled'} "
                  f"(moment {tip})", fontsize=9)
    ax2.set_xlabel("x (µm)")
    fig.colorbar(im2, ax=ax2, label="s (white +Ms, black −Ms)", shrink=0.85)
    return fig


def field_figure(hz_a_per_m: np.ndarray, hz_std_a_per_m: np.ndarray, *, pixel_m: tuple[float, float],
                 height_m: float, margin_px: int = 0, band_nm: tuple[float, float] | None = None) -> Figure:
    """mu0 Hz and its standard uncertainty, both in mT, with colour bars."""
    from matplotlib.patches import Rectangle

    b = np.asarray(hz_a_per_m, dtype=float) * MU_0 * 1e3
    s = np.asarray(hz_std_a_per_m, dtype=float) * MU_0 * 1e3
    rows, cols = b.shape
    extent = (0, cols * pixel_m[1] * 1e6, 0, rows * pixel_m[0] * 1e6)
    fig = Figure(figsize=(11.0, 4.9), layout="constrained")
    ax, ax2 = fig.subplots(1, 2)
    lim = symmetric_limit(b, percentile=100.0)  # the whole field on the scale: its peaks are the point of the map
    im = ax.imshow(b, origin="lower", extent=extent, cmap="RdBu_r", vmin=-lim, vmax=lim)
    band = f", periods {span(*band_nm, 'nm')}" if band_nm else ""
    ax.set_title(f"μ0 Hz at {quantity(height_m, 'm', digits=3)} above the sample{band}", fontsize=10)
    fig.colorbar(im, ax=ax, label="μ0 Hz (mT); red: pointing away from the sample", shrink=0.85)
    im2 = ax2.imshow(s, origin="lower", extent=extent, cmap="cividis", vmin=0.0,
                     vmax=float(np.percentile(s, 99.5)) or 1.0)
    ax2.set_title("standard uncertainty (Monte Carlo)", fontsize=10)
    fig.colorbar(im2, ax=ax2, label="u(μ0 Hz) (mT)", shrink=0.85)
    for a in (ax, ax2):
        a.set_xlabel("x (µm)")
        a.set_ylabel("y (µm)")
        if margin_px and 2 * margin_px < min(rows, cols):
            m = margin_px
            a.add_patch(Rectangle((m * pixel_m[1] * 1e6, m * pixel_m[0] * 1e6), (cols - 2 * m) * pixel_m[1] * 1e6,
                                  (rows - 2 * m) * pixel_m[0] * 1e6, fill=False, ls="--", lw=0.8, ec="0.3"))
    fig.suptitle(f"Stray field; {_SIGN}; dashed: edge margin", fontsize=9)
    return fig


def write_tip_figures(cal, out_dir: str | Path, *, pixel_m, gradient_n_per_m) -> list[Path]:
    out = Path(out_dir)
    return [save_png(ttf_figure(cal, pixel_m=pixel_m), out / "ttf.png"),
            save_png(pattern_figure(cal, gradient_n_per_m=gradient_n_per_m, pixel_m=pixel_m),
                     out / "reference_pattern.png")]


def write_field_figures(fm, out_dir: str | Path, *, name: str = "field_map") -> list[Path]:
    out = Path(out_dir)
    return [save_png(field_figure(fm.hz_a_per_m, fm.hz_std_a_per_m, pixel_m=fm.pixel_m, height_m=fm.height_m,
                                  margin_px=fm.margin_px, band_nm=tuple(p * 1e9 for p in fm.band_periods_m)),
                     out / f"{name}.png")]


def figures_from_session(session, out_dir: str | Path) -> list[Path]:
    """The field-map figure of every field map stored in a session file (for the report)."""
    out = Path(out_dir)
    paths = []
    names = session.field_map_names()
    for name in names:
        rec = session.read_field_map(name)
        s = rec.scalars
        fig = field_figure(rec.arrays["hz_a_per_m"], rec.arrays["hz_std_a_per_m"],
                           pixel_m=(float(s["pixel_row_nm"]) * 1e-9, float(s["pixel_col_nm"]) * 1e-9),
                           height_m=float(s["height_nm"]) * 1e-9, margin_px=int(s.get("margin_px", 0)),
                           band_nm=(float(s["band_short_nm"]), float(s["band_long_nm"])))
        paths.append(save_png(fig, out / ("field_map.png" if len(names) == 1 else f"field_map_{name}.png")))
    if names:
        tip_file = str(session.read_field_map(names[-1]).scalars.get("tip_file", ""))
        if tip_file and Path(tip_file).is_file():
            from assistant.storage.quantitative_files import read_tip_file

            tip = read_tip_file(tip_file)
            pixel = tuple(np.asarray(tip["pixel_nm"], dtype=float) * 1e-9)
            paths.append(save_png(ttf_figure(tip.values, pixel_m=pixel), out / "ttf.png"))
    return paths
