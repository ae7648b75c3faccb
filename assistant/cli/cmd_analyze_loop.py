"""``mfma analyze loop FILE.npz|SESSION.h5``: switching fields, the loop, Hc and the switching-field spread."""

from __future__ import annotations

from pathlib import Path

from assistant.cli._common import UsageError, emit_json, emit_text


def run(args) -> int:
    import numpy as np

    from assistant.cli.cmd_analyze import _existing, _is_hdf5
    from assistant.procedures.analyse_loop import analyse_npz, analyse_stored
    from assistant.storage.session_file import SessionFile

    p = _existing(args.file)
    if _is_hdf5(p):
        with SessionFile.open(p, "r") as sf:
            result = analyse_stored(sf, args.field_series, write=False, tip_moment=args.tip_moment)
            phase = sf.read_field_series(args.field_series or sf.field_series_names()[-1]).phase_deg
    elif p.suffix.lower() == ".npz":
        result = analyse_npz(p, tip_moment=args.tip_moment)
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


def text_lines(result, d: dict) -> list[str]:
    """The human-readable summary of a loop analysis."""
    def ka(v, digits=4):
        return "not determined" if v is None else f"{v:.{digits}g} kA/m"

    lines = [f"elements: {d['dots']} ({result.elements.source})",
             f"coercive field Hc = {ka(d['coercive_field_ka_per_m'])} ± {ka(d['coercive_field_std_ka_per_m'], 2)}",
             f"switching-field spread sigma = {ka(d['sfd_sigma_ka_per_m'], 3)} (step width accounted for)"]
    for label, fit in (("descending", result.down_fit), ("ascending", result.up_fit)):
        if fit is not None:
            lines.append(f"  {label} branch: mean |H_sw| {fit.mean / 1e3:.4g} kA/m, sigma "
                         f"{'-' if fit.sigma != fit.sigma else f'{fit.sigma / 1e3:.3g}'} kA/m, "
                         f"{fit.switched} of {fit.elements} elements switched")
    if result.loop_fit_down is not None:
        f = result.loop_fit_down
        lines.append(f"  loop fit (descending branch, non-interacting elements): Hc {f.coercive / 1e3:.4g} kA/m, "
                     f"sigma {f.sigma / 1e3:.3g} kA/m")
    if result.tagawa_sigma_a_per_m == result.tagawa_sigma_a_per_m:
        lines.append(f"interaction-corrected spread (Tagawa Delta-H(M, Delta-M)): "
                     f"{result.tagawa_sigma_a_per_m / 1e3:.3g} ± {result.tagawa_sigma_std_a_per_m / 1e3:.2g} kA/m")
    rev = d["tip_reversals_ka_per_m"]
    lines.append("tip reversals at: " + (", ".join(f"{h:g}" for h in rev) + " kA/m" if rev else "none"))
    lines.append("elements switched by the tip: " + (", ".join(str(e) for e in d["tip_switched_elements"]) or "none"))
    lines.append("element  down_ka_per_m  up_ka_per_m")
    for i, (down, up) in enumerate(d["switching_fields_ka_per_m"]):
        lines.append(f"{i:7d}  {'-' if down is None else f'{down:.4g}':>13}  {'-' if up is None else f'{up:.4g}':>11}")
    return lines + [f"note: {n}" for n in result.notes]
