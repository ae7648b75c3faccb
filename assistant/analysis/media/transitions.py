"""Transitions along one track: detection, then one joint fit of every position.

The image of a track is linear in the magnetisation, so a track profile is the sum of the responses of its
transitions: s(x) = c + A sum_j sigma_j g(x - x_j), with g the image of one transition
(:func:`.transfer.transition_response`) and sigma_j = +-1 alternating (in saturated recording every transition
reverses the one before). Closely spaced transitions overlap in the image and pull each other's peaks and zero
crossings: fitting all positions at once against the superposition removes that interaction (it is exact for a
linear response; the phase's arctan and a wrong shape of g leave the rest). Positions come out to a fraction of a
pixel, each with its standard error from the fit.

Detection: the profile is filtered back to the comb of transitions (one peak of alternating sign per transition)
with a Wiener filter of g whose regularisation comes from the profile's noise and power; the filter's own image
of one transition, side lobes included, is then taken off peak by peak (CLEAN) so that a lobe is never read as a
transition; consecutive equal signs are resolved in favour of the larger. These positions seed the fit.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from .clean import clean
from .transfer import TrackResponse, track_transition_response, transition_response

__all__ = ["TrackTransitions", "fit_track_transitions"]


def next_fast_len(n: int) -> int:
    """The smallest length >= ``n`` whose prime factors are all 2, 3, 5, 7 or 11 (numpy's pocketfft is fast on
    those). The same lengths as ``scipy.fft.next_fast_len`` (checked in the tests), written here because loading
    scipy.fft costs 0.15 s, half of what ``mfma analyze image`` spends on its fits."""
    m = max(int(n), 1)
    while True:
        rest = m
        for p in (2, 3, 5, 7, 11):
            while rest % p == 0:
                rest //= p
        if rest == 1:
            return m
        m += 1


@dataclass(frozen=True)
class TrackTransitions:
    """Transitions of one track profile (positions in pixels along the profile, 0 = first pixel centre).

    Attributes
    ----------
    positions_px, positions_std_px : ndarray (J,)
    signs : ndarray (J,)
        +1 for a -Ms -> +Ms transition in the image's sense, -1 for the reverse (alternating).
    detected_px : ndarray (J,)
        Positions before the joint fit (the detector's, pulled by neighbouring transitions).
    interior : ndarray of bool (J,)
        Far enough from the profile's ends to be reported.
    width_px, width_std_px : float
        w = spacing + transition parameter (+ tip offset), from the fit.
    thickness_px : float or None
    amplitude : float
    residual_rms, noise : float
        Residual rms of the fit and the profile's noise (same units as the profile).
    n_fitted, n_parameters : int
        Profile points the fit weighed, and the parameters it fitted (for :attr:`information`).
    seed_width_px : float or None
        The width the detector assumed for ``detected_px`` (a retry seeded at another width detects shifted
        positions, which say nothing of the neighbours' pull).
    """

    positions_px: np.ndarray
    positions_std_px: np.ndarray
    signs: np.ndarray
    detected_px: np.ndarray
    interior: np.ndarray
    width_px: float
    width_std_px: float
    thickness_px: float | None
    amplitude: float
    residual_rms: float
    noise: float
    n_fitted: int = 0
    n_parameters: int = 0
    seed_width_px: float | None = None

    @property
    def information(self) -> float:
        """Schwarz's Bayesian information criterion per fitted point, ln(RSS / m) + p ln(m) / m, for Gaussian
        residuals of unknown variance (Schwarz 1978, Ann. Stat. 6, 461): of two fits of one profile the lower is
        the better model. A lower residual alone favours more transitions, and where the model's own error is
        tens of times the noise (unmodelled old data beside a track) spurious ones lower it a little."""
        m = max(self.n_fitted, 1)
        return float(2.0 * np.log(max(self.residual_rms, 1e-300)) + self.n_parameters * np.log(m) / m)


def _detect(profile, *, orientation, width_px, thickness_px, tip, noise, pad, track=None, along_px=0.0):
    n = profile.size
    length = next_fast_len(n + 2 * pad)
    ext = np.zeros(length)
    centred = profile - profile.mean()
    ext[pad:pad + n] = centred
    # continue the profile into the padding by point reflection about each end (value and slope continuous),
    # fading to zero with a half-cosine: no jump or kink for the filters to ring on
    m = min(pad, n - 2)
    fade = 0.5 * (1 + np.cos(np.pi * (np.arange(1, m + 1)) / (m + 1)))
    ext[pad + n:pad + n + m] = (2 * centred[-1] - centred[-2:-m - 2:-1]) * fade
    ext[pad - m:pad] = ((2 * centred[0] - centred[1:m + 1]) * fade)[::-1]
    k = 2 * np.pi * np.fft.rfftfreq(length)
    if track is None:
        g = transition_response(k, orientation=orientation, width_m=width_px, thickness_m=thickness_px,
                                tip_transfer=tip)
    else:
        g = track_transition_response(k, orientation=orientation, width_m=width_px, thickness_m=thickness_px,
                                      track_width_m=track[0], core_half_m=track[1], along_m=along_px,
                                      tip_transfer=tip)
    # Wiener estimate of the comb of transitions: E|S|^2 = A^2 J |g|^2 + noise^2 L for J transitions of random
    # positions (E|comb|^2 = J), so the regularisation is noise^2 L / (A^2 J), with A^2 J from the profile's
    # power above noise. The comb is shown through a Gaussian peak whose band ends well inside the band where
    # the signal is above noise (k_c), and without its slowest components (alternating signs leave the comb
    # little power there, and a slow background would be amplified).
    spec = np.fft.rfft(ext)
    g2 = np.abs(g) ** 2
    signal = max(float(np.sum(np.abs(spec) ** 2) - spec.size * noise**2 * length), 1e-300) / max(float(g2.sum()),
                                                                                                    1e-300)
    lam = noise**2 * length / signal
    above = np.flatnonzero(g2 >= lam)
    k_c = k[above[-1]] if above.size else k[1]
    k_t = max(k_c / 2.5, 2 * np.pi / length)
    k_lo = 2 * np.pi / (16.0 * max(width_px, 1.0))
    filt = np.exp(-0.5 * (k / k_t) ** 2) * k**2 / (k**2 + k_lo**2) * np.conj(g) / (g2 + lam)
    t = np.fft.irfft(spec * filt, n=length)[pad:pad + n]
    t_noise = noise * np.sqrt(np.mean(np.abs(filt) ** 2) * 2.0)
    # the image of one unit transition through the same filter, with its side lobes, for the CLEAN loop
    h = np.fft.fftshift(np.fft.irfft(g * filt, n=length))
    mid = length // 2
    reach = min(n, mid - 1)
    kernel = h[mid - reach:mid + reach + 1]
    # levels from the interior: the ends are where the padding's guess shows
    edge = int(min(np.ceil(2 * width_px), n // 8))
    margin = min(width_px, n / 16)
    inner = np.abs(t[edge:n - edge]) if n > 2 * edge + 2 else np.abs(t)
    strong = float(np.max(inner)) if inner.size else 0.0
    # fade the estimate out between 2 w and w from either end: there the padding's guess shows, and the loop
    # would spend itself on it (and its large components would set the scale that real ones are judged by)
    x = np.arange(n, dtype=float)
    fade = np.clip((np.minimum(x, n - 1 - x) - margin) / max(edge - margin, 1.0), 0.0, 1.0)
    pos, amp = clean(np.clip(t, -1.5 * strong, 1.5 * strong) * fade, kernel, max(5.0 * t_noise, 0.15 * strong))
    if pos.size == 0:
        return np.array([]), np.array([]), t
    # components of one transition (the loop takes several bites at a peak): merge those within a pixel
    order = np.argsort(pos)
    pos, amp = pos[order], amp[order]
    groups: list[list[int]] = [[0]]
    for j in range(1, pos.size):
        if pos[j] - pos[groups[-1][-1]] < 1.0 and np.sign(amp[j]) == np.sign(amp[groups[-1][0]]):
            groups[-1].append(j)
        else:
            groups.append([j])
    gp = np.array([np.average(pos[gr], weights=np.abs(amp[gr])) for gr in groups])
    ga = np.array([amp[gr].sum() for gr in groups])
    # within about w of an end the filter sees the padding's guess, not data: nothing found there is trusted
    inside = (gp >= margin) & (gp <= n - 1 - margin)
    gp, ga = gp[inside], ga[inside]
    if gp.size == 0:
        return gp, ga, t
    big = np.abs(ga) >= 0.25 * np.percentile(np.abs(ga), 90)
    gp, ga = gp[big], ga[big]
    # consecutive equal signs: keep the larger (a transition has one sign, its neighbours the other)
    keep_i: list[int] = []
    for j in range(gp.size):
        if keep_i and np.sign(ga[j]) == np.sign(ga[keep_i[-1]]):
            if abs(ga[j]) > abs(ga[keep_i[-1]]):
                keep_i[-1] = j
            continue
        keep_i.append(j)
    return gp[keep_i], np.sign(ga[keep_i]), t


class _Model:
    """Forward model of a padded profile and its Jacobian (numpy FFTs; positions in pixels).

    Parameters: the J positions, then the amplitude and the offset, then the free shape parameters among
    w and t (thickness), in that order (the arctan parameter a of a finite track is held).
    """

    def __init__(self, n, pad, orientation, tip, track, shape0: dict, free: tuple[str, ...]):
        self.n, self.pad = n, pad
        self.length = next_fast_len(n + 2 * pad)
        self.k = 2 * np.pi * np.fft.rfftfreq(self.length)
        self.orientation, self.tip, self.track = orientation, tip, track
        self.shape0, self.free = dict(shape0), tuple(free)
        self.response = None
        if track is not None:
            self.response = TrackResponse(self.k, orientation=orientation, track_width_m=track[0],
                                          core_half_m=track[1], w_min=self.shape0["w"],
                                          along_m=self.shape0.get("a", 0.0), tip_transfer=tip)
        self.fixed = None if self.free else self.shape(self.shape0)[0]

    def shape(self, sp: dict, derivatives: bool = False):
        """g and, with ``derivatives``, {name: dg/dname} for the free shape parameters, per rfft frequency."""
        w, t = sp["w"], sp["t"]
        if self.response is not None:
            out = self.response(w, t, derivatives=derivatives)
            if not derivatives:
                return out, {}
            g, g_w, g_t = out
            return g, {"w": g_w, "t": g_t}
        g = transition_response(self.k, orientation=self.orientation, width_m=w, thickness_m=t, tip_transfer=self.tip)
        if not derivatives:
            return g, {}
        ka = np.abs(self.k)
        g_t = np.zeros_like(g)
        if t is not None:
            kt = ka * t
            g_t = np.where(kt > 0, ka * np.exp(-kt) / -np.expm1(-np.where(kt > 0, kt, 1.0)), 0.0) * g
        return g, {"w": -ka * g, "t": g_t}

    def unpack(self, p, j):
        sp = dict(self.shape0)
        sp.update(zip(self.free, p[j + 2:]))
        return p[:j], p[j], p[j + 1], sp

    def evaluate(self, p, signs, jac=False):
        j = signs.size
        x, amp, c, sp = self.unpack(p, j)
        if self.fixed is not None:
            g, dg = self.fixed, {}
        else:
            g, dg = self.shape(sp, derivatives=jac)
        # exp(-i k x) for the evenly spaced k = 2 pi m / L: the powers of the first factor, as a running product
        # (2.4x faster than the exponentials of the (J, K) array; within 1e-12 of them)
        phase = np.empty((j, self.k.size), complex)  # (J, K)
        phase[:, 0] = 1.0
        phase[:, 1:] = np.exp(-1j * self.k[1] * (x + self.pad))[:, None]
        np.cumprod(phase, axis=1, out=phase)
        comb = np.einsum("j,jk->k", signs, phase)
        sl = slice(self.pad, self.pad + self.n)
        base = np.fft.irfft(g * comb, n=self.length)[sl]
        model = amp * base + c
        if not jac:
            return model
        phase *= (-1j * amp) * self.k * g  # in place: the d/dx_j columns need no other (J, K) array
        phase *= signs[:, None]
        cols = [np.fft.irfft(phase, n=self.length, axis=-1)[:, sl], base[None], np.ones((1, self.n))]
        cols += [amp * np.fft.irfft(dg[name] * comb, n=self.length)[sl][None] for name in self.free]
        return model, np.concatenate(cols, axis=0).T


def _levenberg_marquardt(fun, p0, lo, hi, *, max_iter=30, tol=1e-7):
    """Bounded Levenberg-Marquardt on the normal equations (a few dozen parameters: the small solve is far
    cheaper than the SVD a general trust-region solver does at each step on a busy two-core machine).
    ``fun(p, jac)`` returns the residuals, and with ``jac`` also the Jacobian (formed only for accepted steps)."""
    p = np.clip(p0, lo, hi)
    r, jm = fun(p, True)
    cost = float(r @ r)
    lam = 1e-3
    for _ in range(max_iter):
        # einsum, not BLAS: on a busy two-core machine the threaded matrix product of these small matrices
        # took 10-20 ms a step (the analysis as a whole 4-5 x longer)
        a = np.einsum("ij,ik->jk", jm, jm)
        g = np.einsum("ij,i->j", jm, r)
        diag = np.maximum(np.diag(a), 1e-300)
        try:
            step = np.linalg.solve(a + lam * np.diag(diag), -g)
        except np.linalg.LinAlgError:
            lam *= 10.0
            continue
        trial = np.clip(p + step, lo, hi)
        r_t = fun(trial, False)
        cost_t = float(r_t @ r_t)
        if cost_t < cost:
            done = cost - cost_t <= tol * max(cost, 1e-300)
            p, cost = trial, cost_t
            r, jm = fun(p, True)
            lam = max(lam / 3.0, 1e-9)
            if done:
                break
        else:
            lam *= 4.0
            if lam > 1e9:
                break
    return p, r, jm


def fit_track_transitions(profile: np.ndarray, *, orientation: str, noise: float, width_px: float,
                          thickness_px: float | None = None, fit_thickness: bool = False,
                          tip_transfer: Callable[[np.ndarray], np.ndarray] | None = None,
                          track_width_px: float | None = None, core_half_px: float = 0.0, along_px: float = 0.0,
                          fit_shape: bool = True, min_transitions: int = 3) -> TrackTransitions | None:
    """Detect and fit every transition of one down-track profile (pixel units throughout).

    ``tip_transfer`` takes k in rad/pixel here. ``width_px`` is the starting value of w; ``thickness_px`` the
    film thickness (None: thick film; with ``fit_thickness`` its starting value, fitted). ``track_width_px``
    (with the half-width of the averaged core rows ``core_half_px``) switches to the response of a track of
    that width (:func:`.transfer.track_transition_response`), with the arctan parameter a held at
    ``along_px``; None treats the track as much wider than w. With ``fit_shape`` False the
    shape stays as given (another track of the image has fitted it) and only positions, amplitude and offset
    are fitted. The fit weighs the profile from 2.5 w inside its ends (transitions beyond the ends are not
    modelled, and their tails reach in); transitions between w and 2.5 w of an end are fitted but flagged as not
    interior. Returns None when fewer than ``min_transitions`` transitions are found.
    """
    s = np.asarray(profile, float)
    n = s.size
    pad = int(min(max(8 * width_px, 32), 4 * n))
    t0 = thickness_px if thickness_px is not None else (2.0 * width_px if fit_thickness else None)
    track = None if track_width_px is None else (float(track_width_px), float(core_half_px))
    a0 = float(np.clip(along_px, 0.0, 0.8 * width_px)) if track is not None else 0.0
    # seeds only: detected as if the film were at least 2 w thick. A thin film's response falls as k^2 at small
    # k, and its regularised inverse lifted slow content (neighbouring tracks, the profile's wander) into steps
    # that hid transitions (3 of 13 found on a synthetic track); the joint fit then uses the real thickness
    pos, signs, _ = _detect(s, orientation=orientation, width_px=width_px,
                            thickness_px=max(t0 or 0.0, 2.0 * width_px), tip=tip_transfer, noise=noise, pad=pad,
                            track=track, along_px=a0)
    if pos.size < min_transitions:
        return None
    free: tuple[str, ...] = ()
    if fit_shape:
        # the arctan parameter a is held (at ``along_px``): on synthetic tracks the profile barely told it from
        # the spacing (residual 2.49 % with the true a = 1.25 px against 2.25 % with a = 0), so fitting it only
        # made the other parameters wander
        free = ("w",) + (("t",) if fit_thickness and t0 is not None else ())
    model = _Model(n, pad, orientation, tip_transfer, track, {"w": float(width_px), "t": t0, "a": a0}, free)
    edge = int(np.ceil(min(2.5 * width_px, n / 8)))
    mask = (np.arange(n) >= edge) & (np.arange(n) < n - edge)
    x_fit, r_fit, jac_fit = _fit(model, s, pos, signs, noise, mask)
    for _ in range(3):
        keep = _unresolved_pairs(x_fit[:signs.size], signs)
        if keep.all() or keep.sum() < min_transitions:
            break
        pos, signs = pos[keep], signs[keep]
        x_fit, r_fit, jac_fit = _fit(model, s, x_fit[:keep.size][keep], signs, noise, mask)
    j = signs.size
    r = r_fit * noise
    dof = max(mask.sum() - x_fit.size, 1)
    chi2 = float(np.sum(r_fit**2) / dof)
    try:
        normal = np.einsum("ij,ik->jk", jac_fit, jac_fit)
        cov = np.linalg.inv(normal + 1e-12 * np.diag(np.diag(normal))) * max(chi2, 1.0)
        sd = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    except np.linalg.LinAlgError:
        sd = np.full(x_fit.size, np.nan)
    x, amp, _, sp = model.unpack(x_fit, j)
    sd_of = dict(zip(free, sd[j + 2:]))
    order = np.argsort(x)
    interior = (x >= edge) & (x <= n - 1 - edge)
    return TrackTransitions(x[order], sd[:j][order], signs[order] * np.sign(amp), pos[order], interior[order],
                            float(sp["w"]), float(sd_of.get("w", 0.0)),
                            None if sp["t"] is None else float(sp["t"]), float(abs(amp)),
                            float(np.sqrt(np.mean(r**2))), float(noise), int(mask.sum()), int(x_fit.size),
                            float(width_px))


def _unresolved_pairs(x: np.ndarray, signs: np.ndarray) -> np.ndarray:
    """Which transitions to keep: two of opposite sign less than a pixel apart (a bit shorter than a pixel, which
    no image that passes the pixels-per-bit check can resolve; the detector merges its components within a pixel
    as well: a rule of thumb, no source) are a pair the fit made up, closest first. Where
    the model misses part of a profile (unmodelled old data beside a track), the fit split one transition into
    three within a pixel, or put two on top of each other: 10-24 of them on a track of 13 written, and a wrong
    bit cell."""
    order = np.argsort(x)
    keep = np.ones(x.size, bool)
    gaps = np.diff(x[order])
    for i in np.argsort(gaps):
        a, b = order[i], order[i + 1]
        if gaps[i] >= 1.0:
            break
        if keep[a] and keep[b] and signs[a] != signs[b]:
            keep[a] = keep[b] = False
    return keep


def _fit(model: _Model, s, pos, signs, noise, mask):
    """One joint fit from the seed positions ``pos``; returns the parameters, residuals and Jacobian."""
    n = s.size
    free = model.free
    sp0 = model.shape0
    base = model.evaluate(np.concatenate([pos, [1.0, 0.0], [sp0[f] for f in free]]), signs)
    bc = base - base.mean()
    amp0 = float(np.dot(bc, s - s.mean()) / max(np.dot(bc, bc), 1e-300))
    p0 = np.concatenate([pos, [amp0, float(np.mean(s - amp0 * base))], [sp0[f] for f in free]])
    w0 = sp0["w"]
    bounds = {"w": (0.3, max(4 * w0, 50.0)), "t": (0.3, max(10 * w0, 100.0))}
    lo = np.concatenate([np.maximum(pos - 3.0, 0.0), [-np.inf, -np.inf], [bounds[f][0] for f in free]])
    hi = np.concatenate([np.minimum(pos + 3.0, n - 1.0), [np.inf, np.inf], [bounds[f][1] for f in free]])
    p0 = np.clip(p0, lo + 1e-9, hi - 1e-9)

    def residual_and_jacobian(p, jac):
        if not jac:
            return (model.evaluate(p, signs) - s)[mask] / noise
        m, jm = model.evaluate(p, signs, jac=True)
        return (m - s)[mask] / noise, jm[mask] / noise

    return _levenberg_marquardt(residual_and_jacobian, p0, lo, hi)
