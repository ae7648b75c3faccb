"""Streaming Welch power-spectral-density estimate in constant memory.

The estimate is the one of Welch (1967, IEEE Trans. Audio Electroacoust. 15, 70): the record is cut into
segments of ``segment_length`` samples overlapping by one half, each segment has its mean removed, is
multiplied by a periodic Hann window, transformed, and the squared moduli are averaged. Scaling is the
one-sided density (V^2/Hz), the same as ``scipy.signal.welch(x, fs, window="hann", nperseg=N,
scaling="density")``; only complete segments are used, as there. Samples arrive in chunks of any size, so
a segment may straddle the boundary between two chunks; memory does not grow with the record length.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft

from assistant.errors import AssistantError

__all__ = ["SpectrumError", "WelchAccumulator", "WelchSpectrum", "welch_variance_inflation"]

# Segments transformed together: bounds the working memory to about this many segment lengths.
_BATCH_SEGMENTS = 16
_BATCH_SAMPLES = 2**20  # and at most about this many samples per batch


class SpectrumError(AssistantError, ValueError):
    """Invalid input to the spectrum estimate (names the quantity, its value and the limit)."""


@dataclass(frozen=True, eq=False)
class WelchSpectrum:
    """An averaged one-sided power spectral density.

    Attributes
    ----------
    frequencies_hz : ndarray
        Bin frequencies, 0 to the Nyquist frequency [Hz].
    psd_v2_per_hz : ndarray
        One-sided power spectral density [V^2/Hz] (unit of the input squared per hertz).
    rate_hz : float
        Sampling rate [Hz].
    segment_length : int
        Samples per segment.
    n_segments : int
        Number of averaged (50 % overlapping) segments.
    variance_inflation : float
        Factor by which the variance of a parameter fitted to this spectrum exceeds the value computed as
        if every bin were an independent mean of ``n_segments`` exponential variates. It accounts for the
        correlation of neighbouring bins (window) and of overlapping segments, for spectra smooth on the
        scale of a few bins; see :func:`welch_variance_inflation`.
    """

    frequencies_hz: np.ndarray
    psd_v2_per_hz: np.ndarray
    rate_hz: float
    segment_length: int
    n_segments: int
    variance_inflation: float

    @property
    def resolution_hz(self) -> float:
        """Bin spacing [Hz]."""
        return self.rate_hz / self.segment_length

    @property
    def duration_s(self) -> float:
        """Length of record that went into the segments [s]."""
        step = self.segment_length // 2
        return ((self.n_segments - 1) * step + self.segment_length) / self.rate_hz


def welch_variance_inflation(window: np.ndarray, n_segments: int, step: int) -> float:
    """Variance inflation of a smooth-spectrum fit caused by bin and segment correlations.

    For a Gaussian process whose spectrum is flat over the width of the window's transform, the
    covariance of the squared transforms of two segments offset by ``s * step`` samples, summed over all
    frequency offsets, is by Parseval ``N * sum_j w_j^2 w_(j+s*step)^2 / (sum_j w_j^2)^2`` times the
    squared spectrum (derived here from the standard periodogram covariance, e.g. Harris 1978,
    Proc. IEEE 66, 51). For a Hann window and 50 % overlap this is 35/18 for s = 0 and 1/12 for |s| = 1,
    giving about 2.11 for many segments.

    Parameters
    ----------
    window : ndarray
        The window samples.
    n_segments : int
        Number of averaged segments.
    step : int
        Samples between segment starts.

    Returns
    -------
    float
        The factor (1 for a rectangular window without overlap).
    """
    w2 = np.asarray(window, dtype=float) ** 2
    n = w2.size
    norm = w2.sum() ** 2
    total = n * np.dot(w2, w2) / norm
    s = 1
    while s * step < n and s < n_segments:
        lagged = n * np.dot(w2[: n - s * step], w2[s * step:]) / norm
        total += 2.0 * (n_segments - s) / n_segments * lagged
        s += 1
    return float(total)


class WelchAccumulator:
    """Accumulate a Welch spectrum from chunks of samples in constant memory.

    Parameters
    ----------
    rate_hz : float
        Sampling rate [Hz].
    segment_length : int
        Samples per segment (even, >= 16); segments overlap by half of it.
    detrend : bool, keyword-only
        Remove each segment's mean before windowing (scipy's ``detrend="constant"``, the default there).
    workers : int
        Threads for the FFT (``scipy.fft`` ``workers``).

    Notes
    -----
    Equal to ``scipy.signal.welch(x, rate_hz, window="hann", nperseg=segment_length, noverlap=
    segment_length // 2, detrend="constant", scaling="density")`` of the concatenated chunks (computed in
    double precision whatever the input type). Working memory is a few times
    ``max(segment_length, 2**20)`` samples, independent of the record length.
    """

    def __init__(self, rate_hz: float, segment_length: int, *, detrend: bool = True, workers: int = 1) -> None:
        if not np.isfinite(rate_hz) or rate_hz <= 0:
            raise SpectrumError(f"sampling rate rate_hz = {rate_hz!r} must be a positive finite number")
        if int(segment_length) != segment_length or segment_length < 16 or segment_length % 2:
            raise SpectrumError(f"segment_length = {segment_length!r} must be an even integer >= 16")
        self.rate_hz = float(rate_hz)
        self.segment_length = n = int(segment_length)
        self._step = n // 2
        self._detrend = detrend
        self._workers = int(workers)
        import scipy.signal  # here, not at import: it costs seconds and only the accumulator needs it

        self._window = scipy.signal.get_window("hann", n)  # periodic (fftbins=True), as scipy.signal.welch
        self._batch = max(1, min(_BATCH_SEGMENTS, _BATCH_SAMPLES // n))
        # Input buffer: the unprocessed tail plus new samples, exactly ``batch`` segments when full.
        self._buf = np.empty(n + (self._batch - 1) * self._step)
        self._fill = 0
        self._work = np.empty((self._batch, n))
        self._sum = np.zeros(n // 2 + 1)
        self._n_segments = 0
        self._n_samples = 0

    @property
    def n_segments(self) -> int:
        """Segments accumulated so far (complete segments still in the buffer not counted)."""
        return self._n_segments

    @property
    def n_samples(self) -> int:
        """Samples received so far."""
        return self._n_samples

    def add(self, chunk: np.ndarray) -> None:
        """Feed the next samples of the record (1-D, finite, real; any length, may be empty)."""
        x = np.asarray(chunk)
        if x.ndim != 1:
            raise SpectrumError(f"chunk must be 1-D, got shape {x.shape}")
        if np.iscomplexobj(x) or (x.size and not np.issubdtype(x.dtype, np.number)):
            raise SpectrumError(f"chunk must hold real numbers, got dtype {x.dtype}")
        pos = 0
        while pos < x.size:
            take = min(x.size - pos, self._buf.size - self._fill)
            part = x[pos:pos + take]
            finite = np.isfinite(part)
            if not finite.all():
                bad = int(np.flatnonzero(~finite)[0])
                raise SpectrumError(
                    f"sample {self._n_samples + bad} is {part[bad]!r}; samples must be finite")
            self._buf[self._fill:self._fill + take] = part
            self._fill += take
            self._n_samples += take
            pos += take
            if self._fill == self._buf.size:
                self._process()

    def _process(self) -> None:
        n, step = self.segment_length, self._step
        if self._fill < n:
            return
        m = (self._fill - n) // step + 1
        segs = np.lib.stride_tricks.sliding_window_view(self._buf[:self._fill], n)[: (m - 1) * step + 1: step]
        work = self._work[:m]
        if self._detrend:
            np.subtract(segs, segs.mean(axis=1, keepdims=True), out=work)
            work *= self._window
        else:
            np.multiply(segs, self._window, out=work)
        spec = scipy.fft.rfft(work, axis=1, workers=self._workers)
        self._sum += np.einsum("ij,ij->j", spec.real, spec.real) + np.einsum("ij,ij->j", spec.imag, spec.imag)
        self._n_segments += m
        rest = self._fill - m * step
        self._buf[:rest] = self._buf[m * step:self._fill]  # numpy handles the overlap
        self._fill = rest

    def result(self) -> WelchSpectrum:
        """The averaged spectrum of all complete segments so far (accumulation may go on afterwards).

        Raises
        ------
        SpectrumError
            If not one complete segment has arrived.
        """
        self._process()
        if self._n_segments == 0:
            raise SpectrumError(
                f"record too short: {self._n_samples} samples, need at least segment_length = "
                f"{self.segment_length}")
        scale = 1.0 / (self.rate_hz * np.dot(self._window, self._window))
        psd = self._sum * (scale / self._n_segments)
        psd[1:-1] *= 2.0  # one-sided: fold negative frequencies; DC and Nyquist (even length) appear once
        freqs = scipy.fft.rfftfreq(self.segment_length, 1.0 / self.rate_hz)
        inflation = welch_variance_inflation(self._window, self._n_segments, self._step)
        return WelchSpectrum(freqs, psd, self.rate_hz, self.segment_length, self._n_segments, inflation)
