"""The results block and the per-height tables of a decomposed lift-height series, for people.

Works on the dictionary form of a decomposition (``SeriesAnalysis.to_dict()``, or a stored analysis record's
scalars and arrays together: the keys are the same), so ``mfma analyze series``, ``summary.md`` and the terminal
UI say the same thing in the same words. No matplotlib, no h5py: cheap to import from the command line.
"""

from __future__ import annotations

import math

from assistant.formatting import DASH, number, percent, quantity

__all__ = ["results_block", "per_height_table", "bias_table", "render_table", "render_block", "parts_together_deg"]


def _list(d: dict, key: str) -> list | None:
    v = d.get(key)
    if v is None:
        return None
    try:
        return [x for x in (v.tolist() if hasattr(v, "tolist") else list(v))]
    except TypeError:
        return None


def _num(v) -> float | None:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def _index_of(heights: list, lift_nm: float) -> int | None:
    for i, h in enumerate(heights):
        if _num(h) is not None and abs(float(h) - lift_nm) <= 1e-6 * max(1.0, abs(lift_nm)):
            return i
    return None


def _whole_std(d: dict, key: str) -> list | None:
    """Standard error and model uncertainty of ``key`` in quadrature, element by element (the model part may be
    missing: then the standard error alone)."""
    sd, model = _list(d, key.replace("_deg", "_std_deg")), _list(d, key.replace("_deg", "_model_std_deg"))
    if sd is None or model is None or len(sd) != len(model):
        return sd

    def both(a, b):
        if isinstance(a, (list, tuple)):
            return [both(x, y) for x, y in zip(a, b)]
        x, y = _num(a), _num(b)
        return None if x is None else math.hypot(x, y or 0.0)

    return both(sd, model)


def _short_range_share(d: dict, i: int) -> str | None:
    """|short-range mean| / magnetic rms at height ``i`` with its propagated uncertainty, as percent."""
    sr, mag = _list(d, "short_range_mean_deg"), _list(d, "magnetic_rms_deg")
    if sr is None or mag is None or i >= len(sr) or i >= len(mag):
        return None
    s, m = _num(sr[i]), _num(mag[i])
    if s is None or m is None or m <= 0:
        return None
    sr_sd, mag_sd = _whole_std(d, "short_range_mean_deg"), _list(d, "magnetic_rms_std_deg")
    ssd = _num(sr_sd[i]) if sr_sd and i < len(sr_sd) else None
    msd = _num(mag_sd[i]) if mag_sd and i < len(mag_sd) else None
    frac = abs(s) / m
    std = None
    if ssd is not None and msd is not None:
        std = math.hypot(ssd / m, abs(s) * msd / m**2)
    return percent(frac, std)


def _lift_text(d: dict) -> str:
    rec = _num(d.get("recommended_lift_nm"))
    heights = _list(d, "heights_nm") or []
    if d.get("kind") == "imaging":  # one or two heights: no recommendation is claimed
        return (f"not given: it needs at least 3 lift heights, this series has {len(heights)} "
                "(the images and their noise are reported)")
    if rec is None:
        sentence = str(d.get("recommendation") or "")
        reason = sentence.split(":", 1)[1].split(".")[0].strip() if ":" in sentence else ""
        regime = d.get("interaction_regime")
        if not reason and regime in ("reversible", "irreversible"):
            reason = f"the tip-sample interaction is {regime} at every measured height"
        return "none: " + (reason or "no measured height meets every criterion")
    text = quantity(rec, "nm")
    i = _index_of(heights, rec)
    if i is None:
        return text
    share = _short_range_share(d, i)
    if share:
        text += f" (short-range part there {share} of the magnetic rms)"
    if i == 0:
        return text + "; the lowest height measured, a lower one may also qualify"
    below = quantity(heights[i - 1], "nm")
    at_noise = _list(d, "residual_at_noise")
    reasons = []
    if at_noise is not None and i - 1 < len(at_noise) and not bool(at_noise[i - 1]):
        reasons.append("continuation residual above noise")
    share_below = _short_range_share(d, i - 1)
    if share_below:
        reasons.append(f"short-range part {share_below}")
    negligible = _list(d, "interaction_negligible")
    if negligible is not None and i - 1 < len(negligible) and not bool(negligible[i - 1]):
        reasons.append("tip-sample interaction not negligible")
    return text + f"; {below} does not qualify" + (f" ({', '.join(reasons)})" if reasons else "")


def _bias_text(d: dict) -> str:
    cpd = _num(d.get("cpd_v"))
    if cpd is None and d.get("cpd_sentence"):  # a bias grid whose image mean did not vary beyond noise
        return "not determined: " + str(d["cpd_sentence"]).rstrip(". ")
    if cpd is None:
        return "not measured (needs a bias grid of three or more biases)"
    sd, model = _num(d.get("cpd_std_v")), _num(d.get("cpd_model_std_v"))
    whole = None if sd is None else math.hypot(sd, model or 0.0)  # as every value here: noise and model together
    return f"{quantity(cpd, 'V', whole)} (V_cpd: nulls the electrostatic part)"


def _warnings(d: dict) -> list[str]:
    out = []
    if d.get("tip_changed_sample") is not None and bool(d["tip_changed_sample"]):
        frac = _num(d.get("tip_changed_fraction"))
        out.append("the tip changed the sample: " + (f"{percent(frac)} of the area changed between the first pass "
                                                      "and its repeat" if frac is not None else "see the change map"))
    sep = d.get("separable")
    if sep is not None and not bool(sep) and d.get("separability"):
        out.append(str(d["separability"]))
    if d.get("edge_note"):
        out.append(str(d["edge_note"]))
    assumed = d.get("assumed") or {}
    if isinstance(assumed, str):  # stored as JSON text
        import json

        assumed = json.loads(assumed)
    if assumed:
        out.append("not stated in the data, assumed: " + ", ".join(
            f"amplitude {quantity(v, 'nm')}" if k == "amplitude_nm" else f"gap offset {v}" for k, v in assumed.items()))
    nan = _num(d.get("nan_pixels"))
    if nan:
        out.append(f"{nan:.0f} pixels without data were left out")
    heights, at_noise = _list(d, "heights_nm"), _list(d, "residual_at_noise")
    if heights and at_noise and len(heights) == len(at_noise):
        bad = [quantity(h, "nm") for h, ok in zip(heights, at_noise) if not bool(ok)]
        if bad:
            out.append("continuation residual above noise at " + ", ".join(bad))
    return out


def _interaction_text(d: dict) -> str | None:
    """The tip-sample interaction regime with its evidence (a sentence that starts with the regime's name)."""
    regime, evidence = d.get("interaction_regime"), d.get("interaction_evidence")
    if not regime:
        return None
    return str(evidence) if evidence else str(regime)


def results_block(d: dict) -> list[tuple[str, str]]:
    """(name, text) pairs: recommended lift and bias with their uncertainties, the tip-sample interaction regime,
    the noise verdict, warnings."""
    noise = d.get("noise_sentence") or d.get("noise_verdict") or DASH
    warnings = _warnings(d)
    interaction = _interaction_text(d)
    return [("Recommended lift height", _lift_text(d)), ("Recommended tip bias", _bias_text(d))] + (
        [("Tip-sample interaction", interaction)] if interaction else []) + [
        ("Noise", str(noise)), ("Warnings", "; ".join(w.rstrip(". ") for w in warnings) if warnings else "none")]


def render_block(pairs: list[tuple[str, str]], *, markdown: bool) -> list[str]:
    if markdown:
        return [f"- **{name}:** {text}" for name, text in pairs]
    width = max(len(n) for n, _ in pairs)
    return [f"{name + ':':<{width + 1}} {text}" for name, text in pairs]


def _cell(values, stds, i) -> str:
    if values is None or i >= len(values):
        return DASH
    sd = _num(stds[i]) if stds is not None and i < len(stds) else None
    return number(values[i], sd, digits=4)


def per_height_table(d: dict) -> tuple[list[str], list[list[str]], list[str]]:
    """Headers, rows and footnotes of the per-height table (lift, magnetic rms, the measured non-magnetic mean and
    its parts, residual, noise). The parts carry their whole uncertainty (noise and model)."""
    heights = _list(d, "heights_nm") or []
    es = _list(d, "electrostatic_mean_deg")
    grid = bool(es) and isinstance(es[0], (list, tuple))
    cols = [("magnetic rms (°)", "magnetic_rms_deg")]
    if not grid and d.get("nonmagnetic_mean_deg") is not None:
        cols.append(("non-magnetic mean (°)", "nonmagnetic_mean_deg"))
    cols.append(("short-range mean (°)", "short_range_mean_deg"))
    if not grid:
        cols.append(("electrostatic mean (°)", "electrostatic_mean_deg"))
    headers = ["lift (nm)"] + [c for c, _ in cols] + ["residual rms (°)", "noise (°)"]
    at_noise = _list(d, "residual_at_noise")
    res, noise = _list(d, "residual_rms_deg"), _list(d, "noise_deg")
    rows, flagged = [], False
    for i, h in enumerate(heights):
        row = [number(h)]
        for _, key in cols:
            row.append(_cell(_list(d, key), _whole_std(d, key), i))
        r = number(res[i], digits=2) if res and i < len(res) else DASH
        if at_noise and i < len(at_noise) and not bool(at_noise[i]):
            r += " *"
            flagged = True
        rows.append(row + [r, number(noise[i], digits=2) if noise and i < len(noise) else DASH])
    notes = ["* continuation residual above noise at this height"] if flagged else []
    return headers, rows, notes


def bias_table(d: dict, biases_v=None) -> tuple[list[str], list[list[str]]] | None:
    """Electrostatic mean (°) per lift height and tip bias (``biases_v``, V), for a bias grid; None without one."""
    es = _list(d, "electrostatic_mean_deg")
    if not es or not isinstance(es[0], (list, tuple)):
        return None
    sd = _list(d, "electrostatic_mean_std_deg")
    heights = _list(d, "heights_nm") or []
    biases = None if biases_v is None else [float(b) for b in biases_v]
    n = len(es[0])
    names = [quantity(b, "V", digits=3) for b in biases] if biases and len(biases) == n else \
        [f"bias {j + 1}" for j in range(n)]
    rows = []
    for i, h in enumerate(heights):
        row = [number(h)]
        for j in range(n):
            s = sd[i][j] if sd and i < len(sd) and j < len(sd[i]) else None
            row.append(number(es[i][j], _num(s), digits=4) if i < len(es) else DASH)
        rows.append(row)
    return ["lift (nm)"] + [f"at {b}" for b in names], rows


def render_table(headers: list[str], rows: list[list[str]], *, markdown: bool) -> list[str]:
    """A table as Markdown or as aligned plain text (numbers right-aligned)."""
    if markdown:
        return (["| " + " | ".join(headers) + " |", "|" + "---|" * len(headers)]
                + ["| " + " | ".join(r) + " |" for r in rows])
    widths = [max(len(h), *(len(r[k]) for r in rows)) if rows else len(h) for k, h in enumerate(headers)]
    lines = ["  ".join(h.rjust(w) for h, w in zip(headers, widths))]
    lines += ["  ".join(c.rjust(w) for c, w in zip(r, widths)) for r in rows]
    return lines


def parts_together_deg(signal_space: str, electrostatic_deg, short_range_deg):
    """The phase the electrostatic and short-range parts give together. Their force gradients add, and each part
    is reported as the phase ``-arctan(Q F'/k)`` of its own gradient, so with k and Q (``signal_space``
    "gradient", as the analysis says) the tangents add, not the phases (-9.6 deg and -1.5 deg give -11.05 deg, not
    -11.1); without them the analysis worked on the phases themselves, and those add."""
    import numpy as np  # here: the rest of this module needs only the standard library

    if signal_space != "gradient":
        return electrostatic_deg + short_range_deg
    total = np.tan(np.radians(electrostatic_deg)) + np.tan(np.radians(short_range_deg))
    return np.degrees(np.arctan(total))
