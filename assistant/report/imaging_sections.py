"""The summary section of a series of one or two lift heights (no decomposition), from its stored dictionary
(``ImagingAnalysis.to_dict()`` or the stored record's scalars and arrays together)."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from assistant.formatting import DASH, number
from assistant.report.results import render_table
from assistant.report.sections import array_lines, scalar_table

_SENTENCES = ("decomposition", "noise_sentence", "cpd_sentence", "tip_change")
_IN_TABLE = {"heights_nm", "bias_v", "image_mean_deg", "image_mean_std_deg", "image_rms_deg", "contrast_rms_deg"}


def _rows(d: Mapping[str, object]) -> list[list[str]]:
    heights = np.atleast_1d(np.asarray(d.get("heights_nm", []), float))
    mean = np.asarray(d.get("image_mean_deg", []), float).reshape(heights.size, -1)
    sd = np.asarray(d.get("image_mean_std_deg", np.full(mean.shape, np.nan)), float).reshape(mean.shape)
    rms = np.asarray(d.get("image_rms_deg", np.full(mean.shape, np.nan)), float).reshape(mean.shape)
    contrast = np.asarray(d.get("contrast_rms_deg", np.full(mean.shape, np.nan)), float).reshape(mean.shape)
    biases = d.get("bias_v")
    biases = None if biases is None else np.atleast_1d(np.asarray(biases, float))
    rows = []
    for i, h in enumerate(heights):
        for j in range(mean.shape[1]):
            bias = number(biases[j]) if biases is not None and j < biases.size else DASH
            rows.append([number(h), bias, number(mean[i, j], sd[i, j], digits=4), number(rms[i, j], digits=4),
                         number(contrast[i, j], digits=4)])
    return rows


def imaging_section(name: str, d: Mapping[str, object]) -> list[str]:
    """What was measured, in sentences and one table per image; then every other stored number."""
    out = [f"### Images of {name} (no decomposition)", ""]
    out += [f"{d[k]}" + "\n" for k in _SENTENCES if isinstance(d.get(k), str) and d[k]]
    rows = _rows(d)
    if rows:
        headers = ["lift (nm)", "bias (V)", "image mean (°)", "rms about the mean (°)", "contrast rms, noise out (°)"]
        out += render_table(headers, rows, markdown=True) + [""]
        if d.get("mean_std_source"):
            out += [f"Standard error of the image mean from {d['mean_std_source']}.", ""]
    rest = {k: v for k, v in d.items() if k not in _IN_TABLE | {"kind", "mean_std_source"} and k not in _SENTENCES}
    out += scalar_table({k: v for k, v in rest.items() if np.ndim(v) == 0})
    listed = array_lines({k: np.asarray(v) for k, v in rest.items() if np.ndim(v) > 0})
    if listed:
        out += ["", "Further numbers:", ""] + listed
    return out + [""]
