"""The CLEAN loop of the transition detector: a filtered profile as a sum of shifted copies of one kernel."""

from __future__ import annotations

import numpy as np

__all__ = ["clean"]


def clean(t: np.ndarray, kernel: np.ndarray, threshold: float, *, gain: float = 0.8, max_components: int = 4000):
    """Components (position, amplitude) with t ~ sum a_j kernel(x - x_j): take the largest peak, subtract the kernel
    there (its side lobes with it), repeat until nothing exceeds ``threshold`` (Hogbom 1974, Astron. Astrophys.
    Suppl. 15, 417; from memory). ``kernel`` is centred at index len // 2."""
    res = t.copy()
    n, half = t.size, kernel.size // 2
    pos, amp = [], []
    k0 = kernel[half]
    for _ in range(max_components):
        i = int(np.argmax(np.abs(res)))
        peak = res[i]
        if abs(peak) < threshold:
            break
        frac = 0.0
        if 0 < i < n - 1:
            y0, y1, y2 = res[i - 1], res[i], res[i + 1]
            den = y0 - 2 * y1 + y2
            frac = float(np.clip(0.5 * (y0 - y2) / den, -0.5, 0.5)) if den != 0 else 0.0
        a = gain * peak / k0
        lo, hi = max(i - half, 0), min(i + half + 1, n)
        res[lo:hi] -= a * kernel[half - (i - lo):half + (hi - i)]
        pos.append(i + frac)
        amp.append(a)
    return np.array(pos), np.array(amp)
