"""What the choice of estimator means for a series, decided from its geometry alone, and how its errors were got.

The default decomposition is the reflected-edge fit, always: it used to switch to the windowed fit where its own
residual was above noise, and that test flipped with the noise draw between two answers hundreds of standard
errors apart (on a 128 x 128 crop: 2.503 or 2.597 deg at 20 nm, a scatter 98 times the reported error). What
remains of the reason for that switch is said from the geometry, which noise does not move.
"""

from __future__ import annotations

import numpy as np

from .frequencies import alias_orders_for, pixel_pair_m

__all__ = ["SMALL_SCAN_FRACTION", "ERROR_METHOD", "auto_estimator", "small_scan_note"]

SMALL_SCAN_FRACTION = 0.12  # continuation range against the scan size from which the note is given

ERROR_METHOD = {
    "reflect": "first-order propagation of the measured white noise through fits with fixed weights; checked "
               "against the scatter over repeats with fresh noise (64-256 px crops: 0.8-1.25)",
    "window": "periodic approximation on the window grid; not checked by Monte Carlo (the magnetic rms scattered "
              "0.8-2.9 times its error on 64 x 64 crops)",
    "periodic": "per-frequency closed form for a periodic scan; not checked by Monte Carlo",
}


def small_scan_note(heights_m, pixel_m: tuple[float, float], shape: tuple[int, int]) -> str:
    """Say so where the scan is small against the continuation range (``(h_max - h_0) / pixel`` along an axis).

    There the reflection's misfit near the edges reaches the interior. Measured on synthetic thin-film crops
    (8 heights 20-140 nm, 10 nm pixels, 0.01 deg noise, 4 patterns), largest error of the magnetic rms below the
    two top heights / at the second highest / at the top: 64 px (range 19 % of the scan) 0.44 / 1.4 / 3.9 %,
    80 px 0.22 / 0.8 / 2.9 %, 96 px (12.5 %) 0.27 / 0.8 / 2.2 %, 128 px (9 %) 0.06 / 0.2 / 0.6 %; on the small
    ones the residual also rose above noise at most heights.
    """
    rows, cols = shape
    span = float(heights_m[-1] - heights_m[0])
    frac = max(span / pixel_m[0] / rows, span / pixel_m[1] / cols)
    if frac < SMALL_SCAN_FRACTION:
        return ""
    return (f"The scan is small against the continuation range ({frac:.0%} of it): the reflected-edge fit's misfit "
            "near the edges reaches the interior (on synthetic crops of this proportion the magnetic rms stayed "
            "within 0.5 % but at the two top heights, off by up to 4 % at the top, and the residual rose above "
            "noise at most heights, which holds back the recommendation); --edge window fits the field outside "
            "the scan instead, at about three times the whole analysis's time, with approximate standard errors.")


def auto_estimator(heights_m, pixel_m) -> tuple[str, str]:
    """The estimator of ``edge="auto"`` and the note that goes with it, from the geometry alone.

    The reflected-edge fit, except where the alias fields (two per order and coarse axis, see
    :func:`~.frequencies.alias_orders_for`) leave no fewer unknowns per frequency than there are heights: then each
    cell is fitted exactly, the residual keeps nothing to be judged against the noise (a 10 x 32 simulated scan
    with 160 nm lines and three heights read 5-116 times the noise), and the windowed fit, whose unknown field
    outside the scan is tied by the heights together, is used instead.
    """
    h = np.atleast_1d(np.asarray(heights_m, dtype=float))
    try:
        orders = alias_orders_for("auto", pixel_pair_m(pixel_m), float(h.min()), h.size)
    except ValueError:
        return "reflect", ""
    fields = 1 + 2 * sum(orders)
    if fields < h.size:
        return "reflect", ""
    return "window", (f"With lines this coarse the alias fields make {fields} unknowns per frequency for {h.size} "
                      "heights, so the reflected-edge fit could not judge its residual against the noise; the "
                      "windowed fit was used instead (its standard errors are approximate).")
