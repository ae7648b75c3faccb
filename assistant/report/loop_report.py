"""The field-series part of the session report: what was measured, the loop's numbers, and the figures of
``assistant.report.loop_figures``. An analysis that fails is a note in the summary, not a failed report."""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path

import numpy as np


def _ka(value: float, digits: int = 4) -> str:
    return "not determined" if value is None or not math.isfinite(value) else f"{value / 1e3:.{digits}g} kA/m"


def _measured_lines(data) -> list[str]:
    h = data.field_a_per_m
    steps = data.completed_steps
    if h.size <= 12:
        shown = ", ".join(f"{v / 1e3:g}" for v in h)
    else:
        shown = f"{h[0] / 1e3:g} … {h[int(np.argmin(h))] / 1e3:g} … {h[-1] / 1e3:g} ({h.size} steps)"
    out = [f"- applied fields (kA/m, out of plane): {shown}",
           f"- completed field steps: {steps} of {h.size} ({'finished' if data.finished else 'partial'})",
           f"- lift height {data.lift_height_m * 1e9:.4g} nm; frame {data.scan_size_m * 1e6:.4g} µm square, "
           f"{data.pixels} pixels x {data.lines} lines, line rate {data.line_rate_hz:.4g} Hz; field axis "
           f"{data.field_axis}"]
    measured = data.measured_field_a_per_m[:steps]
    ok = np.isfinite(measured)
    if ok.any():
        off = np.abs(measured[ok] - h[:steps][ok])
        out.append(f"- field as read after settling: at most {off.max() / 1e3:.3g} kA/m from the set value")
    return out


def _result_lines(a) -> list[str]:
    out = [f"- elements: {a.count} (found in the {a.elements.source})",
           f"- coercive field (mean switching field, both branches): {_ka(a.coercive_a_per_m)} ± "
           f"{_ka(a.coercive_std_a_per_m, 2)}",
           f"- switching-field spread σ (normal law fitted to the switching intervals): {_ka(a.sfd_sigma_a_per_m, 3)} "
           f"± {_ka(a.sfd_sigma_std_a_per_m, 2)}",
           f"- cross-check, Sheppard-corrected spread of the interval midpoints: {_ka(a.sheppard_sigma_a_per_m, 3)}"]
    for label, fit in (("descending", a.loop_fit_down), ("ascending", a.loop_fit_up)):
        if fit is not None:
            out.append(f"- loop fit of the {label} branch (non-interacting elements): Hc {_ka(fit.coercive)}, "
                       f"σ {_ka(fit.sigma, 3)}")
    if math.isfinite(a.tagawa_sigma_a_per_m):
        out.append(f"- interaction-corrected spread (Tagawa ΔH(M, ΔM), recoil branch): "
                   f"{_ka(a.tagawa_sigma_a_per_m, 3)} ± {_ka(a.tagawa_sigma_std_a_per_m, 2)}")
    rev = a.tip_reversal_fields_a_per_m
    out.append("- tip reversals at: " + (", ".join(f"{h / 1e3:g}" for h in rev) + " kA/m" if rev else "none"))
    switched = a.tip_switched_elements
    out.append("- elements switched by the tip while imaging: " + (", ".join(map(str, switched)) or "none"))
    return out + [f"- note: {n}" for n in a.notes]


def _headline(name: str, a) -> str:
    """One line for the summary's results: Hc, spread, elements, the tip."""
    from assistant.formatting import quantity

    sigma = quantity(a.sfd_sigma_a_per_m, "A/m") if math.isfinite(a.sfd_sigma_a_per_m) else "not resolved"
    rev = ", ".join(quantity(h, "A/m") for h in a.tip_reversal_fields_a_per_m) or "none"
    by_tip = len(a.tip_switched_elements)
    return (f"- **Field series {name}:** coercive field {quantity(a.coercive_a_per_m, 'A/m', a.coercive_std_a_per_m)}"
            f", switching-field spread {sigma}, {a.count} elements; tip reversals at {rev}"
            + (f"; {by_tip} element(s) switched by the tip" if by_tip else ""))


def field_series_report(session, out_dir: Path, notes: list[str], loops: Mapping[str, object] | None = None
                        ) -> tuple[list[str], list[Path], list[str]]:
    """Summary lines, figure paths and the lines for the summary's results, for every field series of an open
    session file."""
    from assistant.procedures.analyse_loop import analyse_stored

    text, paths, results = ["## Field series", ""], [], []
    for name in session.field_series_names():
        data = session.read_field_series(name)
        text += [f"### Field series {name}", ""] + _measured_lines(data) + [""]
        result = (loops or {}).get(name)
        if result is None:
            try:
                result = analyse_stored(session, name, write=False)
            except ValueError as exc:  # too few steps, no elements: say so, keep the report
                notes.append(f"field series {name!r} not analysed: {exc}")
                continue
        text += ["Loop analysis:", ""] + _result_lines(result) + [""]
        results += [_headline(name, result), ""]
        try:
            from assistant.report.loop_figures import write_loop_figures

            paths += write_loop_figures(result, out_dir, phase_deg=data.phase_deg, prefix=f"{name}_")
        except Exception as exc:  # one figure must not cost the whole report
            notes.append(f"figures of field series {name!r} failed: {type(exc).__name__}: {exc}")
    return text, paths, results
