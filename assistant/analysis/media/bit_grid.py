"""The bit-cell grid of a track: bit length and phase from the transition positions, and the jitter about it.

Written transitions sit on the boundaries of bit cells, x_n = phase + n B, displaced by the write jitter. With
random data only some boundaries carry a transition, so the grid is found from the positions themselves: the
frequency f = 1/B at which exp(2 pi i f x_j) adds up coherently over all transitions (a comb at every cell
boundary has its first coherent frequency at 1/B; its multiples n/B are coherent too, so the peak found is moved
down to the comb's fundamental), then a straight-line fit x_j = phase + n_j B with integer n_j.
Jitter: the rms deviation of the transitions from the grid (common practice in recording, no source here),
with the grid's two fitted parameters taken out of the degrees of freedom.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["BitGrid", "fit_bit_grid"]


@dataclass(frozen=True)
class BitGrid:
    """Grid of one track (lengths in the unit of the positions given).

    Attributes
    ----------
    bit_length, bit_length_std : float
    phase : float
        Position of the cell boundary n = 0 (in [0, bit_length)).
    cells : ndarray of int (J,)
        Boundary index of each transition.
    deviations : ndarray (J,)
        Position minus its grid point.
    jitter : float
        rms deviation, degrees of freedom J - 2.
    coherence : float
        |mean exp(2 pi i x / B)| at the fitted B: 1 for transitions exactly on the grid.
    off_grid : ndarray of bool (J,)
        Transitions more than ``off_grid_fraction`` of a cell from the grid (a misplaced or spurious transition,
        not jitter): left out of the grid fit and the jitter.
    """

    bit_length: float
    bit_length_std: float
    phase: float
    cells: np.ndarray
    deviations: np.ndarray
    jitter: float
    coherence: float
    off_grid: np.ndarray


def _coherence(x: np.ndarray, freqs: np.ndarray) -> np.ndarray:
    return np.abs(np.exp(2j * np.pi * np.outer(freqs, x)).mean(axis=1))


def _refine(x, bit, min_transitions, off_grid_fraction):
    """Integer cells, a straight-line fit, outliers out, until nothing changes: (bit, phase, use) or None."""
    phase = float(np.angle(np.exp(2j * np.pi * x / bit).mean()) / (2 * np.pi) * bit)
    use = np.ones(x.size, bool)
    for _ in range(4):
        cells = np.rint((x - phase) / bit).astype(int)
        design = np.column_stack([np.ones(use.sum()), cells[use].astype(float)])
        coef, *_ = np.linalg.lstsq(design, x[use], rcond=None)
        phase, bit = float(coef[0]), float(coef[1])
        if not bit > 0:
            return None
        new_cells = np.rint((x - phase) / bit).astype(int)
        new_use = np.abs(x - (phase + new_cells * bit)) <= off_grid_fraction * bit
        if new_use.sum() < min_transitions:
            return None
        if np.array_equal(new_cells, cells) and np.array_equal(new_use, use):
            break
        use = new_use
    return bit, phase, use


def _multiples(x: np.ndarray, f0: float, d: int) -> bool:
    """Whether the transitions' cells at the frequency ``f0`` lie d apart (80 % of them in one residue class mod
    d, the 80 % of the coherence rule): a cell d times longer holds them only then. Coherence alone does not
    say it when a track has few transitions: its coherence is broad, and four transitions 3, 5 and 3 cells of
    80 nm apart held a 215 nm cell at 93 % of the peak."""
    phase = np.angle(np.exp(2j * np.pi * f0 * x).mean()) / (2 * np.pi)
    residue = np.mod(np.rint(f0 * x - phase).astype(int), d)
    return bool(np.bincount(residue, minlength=d).max() >= 0.8 * x.size)


def _peak(x: np.ndarray, f_lo: float, f_hi: float, span: float) -> tuple[float, float]:
    """Frequency of the highest coherence in [f_lo, f_hi] (grid fine against the peak width 1/span)."""
    n_f = int(min(max(8 * (f_hi - f_lo) * span, 64), 20000))
    freqs = np.linspace(f_lo, f_hi, n_f)
    coh = _coherence(x, freqs)
    i = int(np.argmax(coh))
    return float(freqs[i]), float(coh[i])


def fit_bit_grid(positions, *, bit_length_hint: float | None = None, min_transitions: int = 4,
                 off_grid_fraction: float = 0.3, min_bit: float = 0.0) -> BitGrid | None:
    """Fit the bit-cell grid to the transition positions of one track (sorted or not).

    ``bit_length_hint`` (e.g. from the other tracks) narrows the search to within 25 % of it; ``min_bit`` is the
    shortest cell considered. The coherence is searched from about half to three times the frequency of the
    lower spacings (a track with few one-cell runs has its lower spacings two cells long), then the peak moves to
    its half or third while the coherence there stays at 80 % of the peak's: the multiples of the cell frequency
    are coherent too, and the bit cell is the longest cell that holds the transitions. Returns None with fewer
    than ``min_transitions`` transitions or no grid.
    """
    x = np.sort(np.asarray(positions, float))
    if x.size < min_transitions:
        return None
    span = x[-1] - x[0]
    if not span > 0:
        return None
    df = 1.0 / span
    if bit_length_hint is not None:
        f0, _ = _peak(x, 0.75 / bit_length_hint, 1.25 / bit_length_hint, span)
    else:
        spacing = np.diff(x)
        usable = spacing[spacing >= min_bit]
        if usable.size == 0:
            return None
        low = float(np.percentile(usable, 15))
        if not low > 0:
            return None
        f_hi = 3.2 / low if min_bit <= 0 else min(3.2 / low, 1.0 / min_bit)
        f_lo = 0.55 / low
        if not f_hi > f_lo:
            return None
        f0, c0 = _peak(x, f_lo, f_hi, span)
        for _ in range(4):  # down to the fundamental of the coherent comb
            moved = False
            for d in (2.0, 3.0):
                f, c = _peak(x, max(f0 / d - 2 * df, 1e-300), f0 / d + 2 * df, span)
                if c >= 0.8 * c0 and (min_bit <= 0 or 1.0 / f <= 1.0 / f_lo * 3) and _multiples(x, f0, int(d)):
                    f0, c0, moved = f, c, True
                    break
            if not moved:
                break
    found = _refine(x, 1.0 / f0, min_transitions, off_grid_fraction)
    if found is None:
        return None
    bit, phase, use = found
    cells = np.rint((x - phase) / bit).astype(int)
    dev = x - (phase + cells * bit)
    dof = max(use.sum() - 2, 1)
    jitter = float(np.sqrt(np.sum(dev[use] ** 2) / dof))
    c = cells[use]
    sxx = float(np.sum((c - c.mean()) ** 2))
    bit_std = jitter / np.sqrt(sxx) if sxx > 0 else np.nan
    shift = np.floor(phase / bit)
    return BitGrid(bit, float(bit_std), float(phase - shift * bit), cells + int(shift), dev, jitter,
                   float(_coherence(x[use], np.array([1.0 / bit]))[0]), ~use)
