"""Drift between field steps and the magnetic contrast of each element at each step.

Drift: every step is registered to the first by cross-correlation, on the topography when each step has its
own, else on the magnitude |phase - image mean| of the magnetic image, which neither an element's reversal nor
the tip's changes. Element arrays are periodic, so the correlation has a peak at every lattice vector: each
step is registered to the step before within a few pixels (drift between neighbours is small), and the running
sum then refined against the first step at the peak nearest it. Sub-pixel by a parabola through the peak's
neighbours (a few hundredths of a pixel on smooth peaks; ample for assigning pixels to elements).

Contrast: the mean over an element's pixels of the registered phase minus the image mean (the image-mean parts,
electrostatic and short-range, are the same over the whole image at one lift height; a large film has no
magnetic mean). Its noise is the pixel noise over the square root of the element's pixel count, the pixel
noise taken from the median absolute difference of neighbouring pixels along the lines (for white noise
the differences have sqrt(2) times the pixel's standard deviation; 1.4826 MAD estimates a normal standard
deviation, both textbook).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from assistant.analysis.lift_series.registration import align_stack

MIN_CORRELATION = 0.1  # well above the ~1/sqrt(pixels) of unrelated images (rule of thumb, no source)


def _filled(images: np.ndarray) -> np.ndarray:
    """Each image minus the mean of its finite pixels; its missing pixels at that mean (zero after)."""
    images = np.asarray(images, dtype=float)
    centred = images - image_means(images)
    ok = np.isfinite(images)
    return centred if ok.all() else np.where(ok, centred, 0.0)


@lru_cache(maxsize=None)
def _disc(radius_px: float) -> tuple[np.ndarray, np.ndarray]:
    """Row and column offsets of the whole pixels within ``radius_px`` of a point."""
    reach = int(np.ceil(radius_px))
    dr, dc = np.meshgrid(np.arange(-reach, reach + 1), np.arange(-reach, reach + 1), indexing="ij")
    inside = dr**2 + dc**2 <= radius_px**2 + 1e-9
    return dr[inside], dc[inside]


def local_shift(corr: np.ndarray, *, guess: np.ndarray, radius_px: float, norm: float) -> tuple[np.ndarray, bool]:
    """``[drow, dcol]`` of the moving image from its periodic cross-correlation ``corr`` with the reference: the
    peak nearest ``guess`` (within ``radius_px``), refined by a parabola through its neighbours along each axis;
    and whether that peak is a match: its correlation coefficient (the peak over ``norm``, the square root of the
    two images' energies) at least ``MIN_CORRELATION`` (else the guess comes back).

    A lattice of elements correlates almost as well with itself shifted by a lattice vector, so the global peak
    is not to be trusted; the drift between neighbouring steps is small, and the peak near the expected shift
    is the right one.
    """
    rows, cols = corr.shape
    g = np.round(np.asarray(guess, dtype=float)).astype(int)
    dr, dc = _disc(radius_px)
    cand_r, cand_c = g[0] + dr, g[1] + dc
    values = corr[cand_r % rows, cand_c % cols]
    i = int(np.argmax(values))
    if not values[i] >= MIN_CORRELATION * norm:  # noise, or nothing in common: no evidence of any shift
        return np.asarray(guess, dtype=float), False
    r0, c0 = int(cand_r[i]), int(cand_c[i])
    shift = np.array([r0, c0], dtype=float)
    b = corr[r0 % rows, c0 % cols]
    for axis, (a, c) in enumerate(((corr[(r0 - 1) % rows, c0 % cols], corr[(r0 + 1) % rows, c0 % cols]),
                                   (corr[r0 % rows, (c0 - 1) % cols], corr[r0 % rows, (c0 + 1) % cols]))):
        den = a - 2.0 * b + c
        if den < 0:
            shift[axis] += min(max(float(0.5 * (a - c) / den), -0.5), 0.5)
    return shift, True


def register_steps(reference_images: np.ndarray, *, step_drift_px: float = 3.0) -> np.ndarray:
    """Drift ``[drow, dcol]`` [px] of each image of a (steps, rows, cols) stack relative to the first.

    Convention of ``analysis.registration``: the content of step k sits ``drift[k]`` pixels from where it sits
    in the first step. ``step_drift_px`` bounds the drift between neighbouring steps.
    """
    stack = _filled(reference_images)
    shape = stack.shape[-2:]
    energy = np.sum(stack**2, axis=(-2, -1))
    spectra = np.fft.rfft2(stack, axes=(-2, -1))
    first = np.conj(spectra[0])
    drift = np.zeros((stack.shape[0], 2))
    for k in range(1, stack.shape[0]):
        step, _ = local_shift(np.fft.irfft2(spectra[k] * np.conj(spectra[k - 1]), s=shape), guess=np.zeros(2),
                              radius_px=step_drift_px, norm=float(np.sqrt(energy[k - 1] * energy[k])))
        drift[k], _ = local_shift(np.fft.irfft2(spectra[k] * first, s=shape), guess=drift[k - 1] + step,
                                  radius_px=1.5, norm=float(np.sqrt(energy[0] * energy[k])))
    return drift


def image_means(images: np.ndarray) -> np.ndarray:
    """Mean of the finite pixels of each image (0 for an image without any), shape (images, 1, 1)."""
    images = np.asarray(images, dtype=float)
    ok = np.isfinite(images)
    pixels = images.shape[-2] * images.shape[-1]
    if pixels and ok.all():  # the same sums without a copy that has zeros for the missing pixels
        return images.sum(axis=(-2, -1), keepdims=True) / pixels
    n = ok.sum(axis=(-2, -1), keepdims=True)
    return np.where(ok, images, 0.0).sum(axis=(-2, -1), keepdims=True) / np.maximum(n, 1)


def magnitude_images(phase_deg: np.ndarray, *, keep_nan: bool = False) -> np.ndarray:
    """|phase - image mean| of every step (NaN pixels set to zero unless ``keep_nan``)."""
    phase = np.asarray(phase_deg, dtype=float)
    out = phase - image_means(phase)
    np.abs(out, out=out)
    return out if keep_nan else np.nan_to_num(out, copy=False, nan=0.0)


def mean_magnitude(phase_deg: np.ndarray) -> np.ndarray:
    """Mean over the steps of |phase - image mean| at each pixel, over the steps that imaged it (NaN if none)."""
    mag = magnitude_images(phase_deg, keep_nan=True)
    ok = np.isfinite(mag)
    n = ok.sum(axis=0)
    return np.where(n > 0, np.where(ok, mag, 0.0).sum(axis=0) / np.maximum(n, 1), np.nan)


def aligned(stack: np.ndarray, drift_px: np.ndarray) -> np.ndarray:
    """The stack brought to the first step's frame; pixels that were NaN, or lie where the step did not
    image, come back NaN."""
    stack = np.asarray(stack, dtype=float)
    bad = ~np.isfinite(stack)
    if not bad.any():
        out = align_stack(stack, drift_px)
    else:
        out = align_stack(np.where(bad, image_means(stack), stack), drift_px)
        out[align_stack(bad.astype(float), drift_px) > 0.25] = np.nan
    # the shift is periodic: what came in over an edge is the far side of the image, not data
    rows, cols = stack.shape[-2:]
    drift = np.asarray(drift_px, dtype=float)
    r = np.arange(rows)[None, :] + drift[:, :1]  # (steps, rows): where each line of the first frame was
    c = np.arange(cols)[None, :] + drift[:, 1:]
    outside_r, outside_c = (r < -0.5) | (r > rows - 0.5), (c < -0.5) | (c > cols - 0.5)
    out[outside_r[:, :, None] | outside_c[:, None, :]] = np.nan
    return out


def pixel_noise(images: np.ndarray) -> np.ndarray:
    """Per-image noise [same unit]: 1.4826 MAD of the differences along the lines, over sqrt(2)."""
    diff = np.diff(np.asarray(images, dtype=float), axis=-1)
    out = np.full(diff.shape[0], np.nan)
    for k, d in enumerate(diff.reshape(diff.shape[0], -1)):
        d = d[np.isfinite(d)]  # a copy of its own: the medians may reorder it
        if d.size:
            deviation = np.abs(d - np.median(d, overwrite_input=True))
            out[k] = 1.4826 * np.median(deviation, overwrite_input=True) / np.sqrt(2.0)
    return out


@dataclass(frozen=True)
class Groups:
    """Pixels of the elements grouped by (element, line), for sums over elements and over their lines."""

    pixels: np.ndarray  # flat pixel indices, sorted by group
    starts: np.ndarray  # (groups,) start of each group in ``pixels``
    element: np.ndarray  # (groups,) element index of each group
    row: np.ndarray  # (groups,) image line of each group
    count: int  # number of elements

    @classmethod
    def of(cls, labels: np.ndarray) -> "Groups":
        rows, cols = labels.shape
        flat = np.flatnonzero(labels.ravel() > 0)
        element = labels.ravel()[flat] - 1
        line = flat // cols
        key = element.astype(np.int64) * rows + line
        order = np.argsort(key, kind="stable")
        keys, starts = np.unique(key[order], return_index=True)
        return cls(pixels=flat[order], starts=starts, element=(keys // rows).astype(int),
                   row=(keys % rows).astype(int), count=int(labels.max()))

    def sums(self, images: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Per group: sum of the finite values and their count, for each image: two (images, groups) arrays."""
        flat = np.asarray(images, dtype=float).reshape(images.shape[0], -1)[:, self.pixels]
        ok = np.isfinite(flat)
        total = np.add.reduceat(np.where(ok, flat, 0.0), self.starts, axis=1)
        count = np.add.reduceat(ok.astype(float), self.starts, axis=1)
        return total, count

    def per_element(self, total: np.ndarray, count: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Group sums folded into element sums: (images, elements) sums and counts."""
        first = np.flatnonzero(np.r_[True, np.diff(self.element) != 0])
        return np.add.reduceat(total, first, axis=1), np.add.reduceat(count, first, axis=1)


def contrasts(images: np.ndarray, groups: Groups) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Element and line contrasts of registered phase images after subtracting each image's mean.

    Returns
    -------
    element_deg : (steps, elements) mean phase over each element minus the image mean (NaN without pixels).
    element_count : (steps, elements) pixels that entered each mean.
    line_deg : (steps, groups) the same per element line (``groups.element``, ``groups.row``).
    line_count : (steps, groups).
    """
    images = np.asarray(images, dtype=float)
    centred = images - image_means(images)
    line_sum, line_n = groups.sums(centred)
    el_sum, el_n = groups.per_element(line_sum, line_n)
    with np.errstate(invalid="ignore", divide="ignore"):
        return el_sum / el_n, el_n, line_sum / line_n, line_n
