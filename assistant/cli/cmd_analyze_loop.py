"""``mfma analyze loop FILE.npz|SESSION.h5``: switching fields, the loop, Hc and the switching-field spread."""

from __future__ import annotations

from pathlib import Path

from assistant.cli._common import UsageError, emit_json, emit_text


def run(args) -> int:
    import numpy as np

    from assistant.cli.cmd_analyze import _existing, _is_hdf5
    from assistant.procedures.analyse_loop import analyse_npz, analyse_stored

    p = _existing(args.file)
    if _is_hdf5(p):
        from assistant.storage import SessionFile  # h5py: 0.03 s to load, which a .npz stack does without

        with SessionFile.open(p, "r") as sf:
            result = analyse_stored(sf, args.field_series, write=False, tip_moment=args.tip_moment)
            if args.plots:  # the stack again, for the figures only
                phase = sf.read_field_series(args.field_series or sf.field_series_names()[-1]).phase_deg
    elif p.suffix.lower() == ".npz":
        result = analyse_npz(p, tip_moment=args.tip_moment)
        if args.plots:
            with np.load(p, allow_pickle=False) as z:
                phase = z["phase_deg"]
    else:
        raise UsageError(f"{p}: expected a .npz stack or a session .h5 file")
    if args.plots:
        from assistant.report.loop_figures import write_loop_figures

        Path(args.plots).mkdir(parents=True, exist_ok=True)
        write_loop_figures(result, Path(args.plots), phase_deg=phase)
    d = result.to_dict()
    if args.json:
        emit_json(d)
    else:
        emit_text(text_lines(result, d))
    return 0


def spread_text(d: dict) -> str:
    """The switching-field spread of ``to_dict`` keys, with its standard error, for people."""
    from assistant.formatting import quantity

    if d["sfd_sigma_ka_per_m"] is None:
        return "not resolved by the field steps"
    std = d["sfd_sigma_std_ka_per_m"]
    return quantity(d["sfd_sigma_ka_per_m"] * 1e3, "A/m", None if std is None else std * 1e3) \
        + " (step width accounted for)"


def tagawa_text(d: dict) -> str:
    """The interaction-corrected spread of ``to_dict`` keys, with its standard error, for people."""
    from assistant.formatting import quantity

    std = d["tagawa_sigma_std_ka_per_m"]
    return quantity(d["tagawa_sigma_ka_per_m"] * 1e3, "A/m", None if std is None else std * 1e3) \
        + " (Tagawa Delta-H(M, Delta-M), recoil branch)"


def text_lines(result, d: dict) -> list[str]:
    """The human-readable summary of a loop analysis: the results first, then per branch and per element."""
    from assistant.formatting import DASH, quantity
    from assistant.report.results import render_block

    a_per_m = lambda v: None if v is None else v * 1e3  # noqa: E731  (quantity scales A/m to kA/m itself)
    rev = d["tip_reversals_ka_per_m"]
    source = {"topography": "topography", "magnetic": "magnetic contrast"}[result.elements.source]
    pairs = [("Coercive field", quantity(a_per_m(d["coercive_field_ka_per_m"]), "A/m",
                                         a_per_m(d["coercive_field_std_ka_per_m"]))),
             ("Switching-field spread", spread_text(d)),
             ("Elements", f"{d['dots']} (found in the {source})"),
             ("Tip reversals", ", ".join(quantity(h * 1e3, "A/m") for h in rev) if rev else "none"),
             ("Switched by the tip", ", ".join(str(e) for e in d["tip_switched_elements"]) or "none")]
    for label, fit in (("Descending branch", result.down_fit), ("Ascending branch", result.up_fit)):
        if fit is not None:
            sigma = quantity(fit.sigma, "A/m") if fit.sigma == fit.sigma else "not resolved"
            pairs.append((label, f"mean |switching field| {quantity(fit.mean, 'A/m', fit.mean_std)}, spread {sigma}, "
                                 f"{fit.switched} of {fit.elements} elements switched"))
    if result.loop_fit_down is not None:
        f = result.loop_fit_down
        pairs.append(("Loop fit", f"Hc {quantity(f.coercive, 'A/m')}, spread {quantity(f.sigma, 'A/m')} "
                                  f"(descending branch, non-interacting elements)"))
    if d["tagawa_sigma_ka_per_m"] is not None:
        pairs.append(("Interaction-corrected spread", tagawa_text(d)))
    lines = render_block(pairs, markdown=False) + [
        "", "First field found reversed on each branch (the element switched between it and the step before):",
        "element  down (kA/m)  up (kA/m)"]
    for i, (down, up) in enumerate(d["switching_fields_ka_per_m"]):
        lines.append(f"{i:7d}  {DASH if down is None else f'{down:.4g}':>11}  {DASH if up is None else f'{up:.4g}':>9}")
    return lines + [f"note: {n}" for n in result.notes]
