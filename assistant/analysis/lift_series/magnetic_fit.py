"""The magnetic part of a lift series: registration and the Laplace continuation fit for each edge estimator
(see :mod:`.decomposition` for the three estimators and when each is used)."""

from __future__ import annotations

import dataclasses

import numpy as np

from .image_noise import shrunk_noise_variance
from .noise_floor import periodic_component_of
from .periodic import fit_with_drift_periodic
from .reflected_drift import fit_with_drift_reflected
from .registration import align_stack, shift_from_spectra

__all__ = ["fit_magnetic"]


def fit_magnetic(flat, okf, h, pixel_m, *, nb: int, edge: str, band: int, register: bool, n_refine: int, image_var,
                 dof, drift_px=None, warm: dict | None = None):
    """Register the (height x bias) images, mean-free in signal units (holes filled), and fit the continuation
    with the estimator ``edge``, weighted by the measured noise of the images (``image_var``, ``dof`` degrees of
    freedom each). ``register``: estimate and refine the drift; ``n_refine``: drift rounds of the periodic model;
    ``drift_px`` (H * B, 2): a drift already found, used as it is (no registration). ``warm``: the windowed
    fit starts from ``warm["solution"]`` if there is one and leaves its own there (fits of nearly the same data:
    the drive-offset error's decompositions). Returns the fit, the drift (H * B, 2) and the aligned images with
    their validity."""
    nimg, rows, cols = flat.shape
    nh = nimg // nb
    drift = np.zeros((nimg, 2)) if drift_px is None else np.array(drift_px, float).reshape(nimg, 2)
    register = register and drift_px is None
    # the first estimate correlates periodic spectra: on a non-periodic scan the seam where opposite edges
    # meet stays put while the content drifts, so the seam is taken out first (periodic-plus-smooth
    # decomposition)
    reg = flat if edge == "periodic" else np.array([periodic_component_of(img) for img in flat])
    if register:
        spectra = np.fft.rfft2(reg, axes=(-2, -1))
        for i in range(1, nimg):  # loop over images, vectorised inside
            drift[i] = shift_from_spectra(spectra[0], spectra[i], (rows, cols))
    height_var = image_var.reshape(nh, nb).mean(axis=1) / nb  # of the bias-averaged image
    if edge == "reflect":
        # band-limited realignment of the reflected images (nothing wraps round), alternating with the fit and
        # Gauss-Newton drift steps; fixed weights from the measured noise, shrunk towards the common level, and
        # rounds until the steps are far below the drift's standard error
        return fit_with_drift_reflected(flat, okf, drift, heights_m=h, pixel_m=pixel_m, nb=nb, interior_px=band,
                                        refine=register, noise_std=np.sqrt(height_var), noise_dof=nb * dof,
                                        weight_std=np.sqrt(shrunk_noise_variance(height_var, nb * dof)),
                                        tol_px=5e-4, max_rounds=16)
    if edge == "periodic":
        # drift rounds with the periodic model (cheap; its leave-one-out template is closed form)
        return fit_with_drift_periodic(reg, okf, drift, heights_m=h, pixel_m=pixel_m, nb=nb, rounds=n_refine,
                                       refine=register)
    # final fit on the raw images: drift in the model, the seam and wrapped borders never fitted; weights from the
    # measured noise of one image per height. It refines the drift itself, alternating with its solve, from the
    # registration's estimate: rounds of the periodic model before it only moved that starting point (on
    # 8 x 256 x 256 with drift they took 0.16-0.24 s of a 0.8-0.9 s analysis, and the map ends as far from the
    # converged solve without them, 1.26 against 1.25 of the noise), and part of the time goes into a tighter solve
    # (see WINDOW_SOLVE). Loaded here: it needs scipy.fft, which the other two estimators do without
    from .windowed import WINDOW_SOLVE, fit_continuation_windowed

    fit = fit_continuation_windowed(flat, heights_m=h, pixel_m=pixel_m, height_index=np.repeat(np.arange(nh), nb),
                                    drift_px=drift, valid=okf, noise_std=np.sqrt(height_var * nb),
                                    refine_drift=register, drift_tol_px=5e-4,
                                    start=None if warm is None else warm.get("solution"), **WINDOW_SOLVE)
    if warm is not None:
        warm["solution"] = fit.solution
    # the magnetic window mean is not separable from the image-mean parts (they absorb it)
    fit = dataclasses.replace(fit, model=fit.model - fit.window_mean[:, None, None])
    drift = fit.drift_px
    valid = align_stack(okf.astype(float), np.rint(drift)) > 0.5
    aligned = align_stack(flat, drift)
    return fit, drift, aligned, valid
