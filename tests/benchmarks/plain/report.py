"""Plain yardstick of `mfma report`: the same figures from a session file with h5py and matplotlib's Agg canvas.

Reads the series, the thermal spectrum, the drive sweep and the stored decomposition, and writes the same
number of PNG figures with the same panels as the report (topography; per tip bias the phase at every height and
the repeat; thermal spectrum and fit; sweep amplitude and phase; decomposition mean, magnetic rms, maps) at
120 dpi with matplotlib's default layout, plus a short Markdown summary.
"""
import sys
from pathlib import Path

import h5py
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

src, out = Path(sys.argv[1]), Path(sys.argv[2])
out.mkdir(parents=True, exist_ok=True)


def figure(size):
    fig = Figure(figsize=size)
    FigureCanvasAgg(fig)
    return fig


def maps(name, images, titles, cols=4):
    rows = -(-len(images) // cols)
    fig = figure((2.6 * cols + 1.2, 2.6 * rows + 0.6))
    axes = fig.subplots(rows, cols, squeeze=False)
    lim = float(np.nanpercentile(np.abs(np.stack(images)), 99.5)) or 1.0
    for ax, img, title in zip(axes.ravel(), images, titles):
        im = ax.imshow(img, origin="lower", cmap="RdBu_r", vmin=-lim, vmax=lim, interpolation="nearest")
        ax.set_title(title, fontsize=9)
    for ax in axes.ravel()[len(images):]:
        ax.set_axis_off()
    fig.colorbar(im, ax=axes.ravel().tolist(), label="phase (deg)")
    fig.savefig(out / f"{name}.png", dpi=120)


def lines(name, panels):
    fig = figure((6.4, 2.4 * len(panels) + 0.6))
    for ax, (x, ys, log) in zip(fig.subplots(len(panels), 1, squeeze=False).ravel(), panels):
        for y in ys:
            ax.plot(x, y, "o-" if x.size < 50 else "-", ms=3)
        if log:
            ax.set_yscale("log")
        ax.set_xlabel("x")
    fig.savefig(out / f"{name}.png", dpi=120)


with h5py.File(src, "r") as f:
    summary = ["# Session " + src.stem, ""]
    for name, g in f["series"].items():
        h = g["lift_height_m"][()] * 1e9
        phase = g["phase_deg"][()]
        repeat = g["repeat_phase_deg"][()] if "repeat_phase_deg" in g else None
        topo = g["topography_m"][()] if "topography_m" in g else phase[0, ..., :, :].reshape(-1, *phase.shape[-2:])[0]
        maps(f"{name}_topography", [topo - np.nanmean(topo)], ["topography"], cols=1)
        stacks = phase if phase.ndim == 3 else np.moveaxis(phase, 1, 0)
        for b, stack in enumerate(stacks if phase.ndim == 4 else [phase]):
            extra = [repeat] if repeat is not None else []
            maps(f"{name}_phase_bias{b}", list(stack) + extra, [f"{v:.4g} nm" for v in h] + ["repeat"] * len(extra))
        summary.append(f"{name}: {phase.shape}")
    p = f["probe"][sorted(f["probe"])[-1]]
    lines("thermal", [(p["spectrum_frequency_hz"][1:], [p["spectrum_psd_v2_per_hz"][1:]], True),
                      (p["fit_frequency_hz"][()], [p["fit_psd_v2_per_hz"][()], p["fit_model_v2_per_hz"][()]], True)])
    r = f["resonance"]
    lines("sweep", [(r["frequency_hz"][()], [r["amplitude_v"][()]], False),
                    (r["frequency_hz"][()], [r["phase_deg"][()]], False)])
    for name, g in f["analysis"].items():
        a = g["result"]
        h = a["heights_m"][()] * 1e9
        mean = a["mean_phase_deg"][()]
        lines("decomposition_mean", [(h, list(np.atleast_2d(mean.T)), False),
                                     (h, [a["short_range_mean_deg"][()]], False)])
        lines("decomposition_magnetic", [(h, [a["magnetic_rms_deg"][()], a["noise_deg"][()]], True),
                                         (h, [a["resolution_period_m"][()]], False)])
        mag, res = a["magnetic_deg"][()], a["residual_deg"][()]
        n = len(h)
        maps("decomposition_maps", [mag[0], mag[n // 2], mag[-1], res[0]], ["magnetic"] * 3 + ["residual"], cols=3)
        summary.append(f"{name}: magnetic rms " + ", ".join(f"{v:.3g}" for v in a["magnetic_rms_deg"][()]))
(out / "summary.md").write_text("\n".join(summary) + "\n")
print(len(list(out.iterdir())))
