"""The field-series part of the session report: what was measured, the loop's numbers, and the figures of
:mod:`assistant.report.loop_figures`, drawn from the loop analysis stored with each field series (or, for one
never analysed, an analysis made now and not written). An analysis that fails is a note in the summary, not a
failed report."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from assistant.formatting import number_list, quantity
from assistant.report.loop_figures import write_loop_figures
from assistant.report.names import field_path


def _field(value: float, std: float | None = None) -> str:
    """A field [A/m] for people (``215.3 ± 2.1 kA/m``); "not determined" when it is not finite."""
    if value is None or not math.isfinite(value):
        return "not determined"
    return quantity(value, "A/m", std if std is not None and math.isfinite(std) else None)


def _measured_lines(data) -> list[str]:
    h = data.field_a_per_m
    steps = data.completed_steps
    if h.size <= 12:
        shown = number_list(h, "A/m")
    else:
        shown = field_path(h)
    out = [f"- applied fields (out of plane): {shown}",
           f"- completed field steps: {steps} of {h.size} ({'finished' if data.finished else 'partial'})",
           f"- lift height {quantity(data.lift_height_m, 'm')}; frame {quantity(data.scan_size_m, 'm')} square, "
           f"{data.pixels} pixels × {data.lines} lines, line rate {quantity(data.line_rate_hz, 'Hz')}; field axis "
           f"{data.field_axis}"]
    from assistant.storage.resume import resumed_sentence

    seams = resumed_sentence(getattr(data, "resumed_at_lines", ()), data.lines, field_steps=True)
    out += [f"- {seams}"] if seams else []
    measured = data.measured_field_a_per_m[:steps]
    ok = np.isfinite(measured)
    if ok.any():
        off = np.abs(measured[ok] - h[:steps][ok])
        out.append(f"- field as read after settling: at most {quantity(off.max(), 'A/m', digits=3)} from the set "
                   f"value")
    return out


def _result_lines(a) -> list[str]:
    out = [f"- elements: {a.count} (found in the {a.elements.source})",
           "- coercive field (mean switching field, both branches): "
           f"{_field(a.coercive_a_per_m, a.coercive_std_a_per_m)}",
           f"- switching-field spread σ (normal law fitted to the switching intervals): "
           f"{_field(a.sfd_sigma_a_per_m, a.sfd_sigma_std_a_per_m)}",
           f"- cross-check, Sheppard-corrected spread of the interval midpoints: {_field(a.sheppard_sigma_a_per_m)}"]
    for label, fit in (("descending", a.loop_fit_down), ("ascending", a.loop_fit_up)):
        if fit is not None:
            out.append(f"- loop fit of the {label} branch (non-interacting elements): Hc {_field(fit.coercive)}, "
                       f"σ {_field(fit.sigma)}")
    if math.isfinite(a.tagawa_sigma_a_per_m):
        out.append(f"- interaction-corrected spread (Tagawa ΔH(M, ΔM), recoil branch): "
                   f"{_field(a.tagawa_sigma_a_per_m, a.tagawa_sigma_std_a_per_m)}")
    rev = a.tip_reversal_fields_a_per_m
    out.append("- tip reversals at: " + (number_list(rev, "A/m") if rev else "none"))
    switched = a.tip_switched_elements
    out.append("- elements switched by the tip while imaging: " + (", ".join(map(str, switched)) or "none"))
    return out + [f"- note: {n}" for n in a.notes]


def _headline(name: str, a) -> str:
    """One line for the summary's results: Hc, spread, elements, the tip."""
    sigma = _field(a.sfd_sigma_a_per_m, a.sfd_sigma_std_a_per_m) if math.isfinite(a.sfd_sigma_a_per_m) \
        else "not resolved"
    rev = ", ".join(quantity(h, "A/m") for h in a.tip_reversal_fields_a_per_m) or "none"
    by_tip = len(a.tip_switched_elements)
    return (f"- **Field series {name}:** coercive field {quantity(a.coercive_a_per_m, 'A/m', a.coercive_std_a_per_m)}"
            f", switching-field spread {sigma}, {a.count} elements; tip reversals at {rev}"
            + (f"; {by_tip} element(s) switched by the tip" if by_tip else ""))


def field_series_report(session, out_dir: Path, notes: list[str]) -> tuple[list[str], list[Path], list[str]]:
    """Summary lines, figure paths and the lines for the summary's results, for every field series of an open
    session file (read only: an analysis made here is not written)."""
    from assistant.procedures.analyse_loop import stored_loop_analysis

    text, paths, results = ["## Field series", ""], [], []
    for name in session.field_series_names():
        data = session.read_field_series(name)
        text += [f"### Field series {name}", ""] + _measured_lines(data) + [""]
        try:
            result = stored_loop_analysis(session, name)
        except ValueError as exc:  # too few steps, no elements: say so, keep the report
            notes.append(f"field series {name!r} not analyzed: {exc}")
            continue
        text += ["Loop analysis:", ""] + _result_lines(result) + [""]
        results += [_headline(name, result), ""]
        try:
            paths += write_loop_figures(result, out_dir, phase_deg=data.phase_deg, prefix=f"{name}_")
        except Exception as exc:  # one figure must not cost the whole report
            notes.append(f"figures of field series {name!r} failed: {type(exc).__name__}: {exc}")
    return text, paths, results
