"""``mfma analyze tip`` and ``mfma analyze field``: quantitative MFM (tip transfer function, stray-field maps).

Conventions printed with every result: z points away from the sample; the tip moment is +z unless
``--tip-moment down``; the measurement plane is the lift height plane as the series defines it (the closest
approach of the oscillating tip); attractive force gradients read as negative (dark) phase.
"""

from __future__ import annotations

import math

from assistant.cli._common import UsageError, emit_json, emit_text

CONVENTIONS = ("z points away from the sample; tip moment +z unless --tip-moment down; measurement plane = closest "
               "approach of the oscillating tip at the lift height")


def _record():
    from assistant.storage.probe_record import ProbeRecord

    return ProbeRecord()


def _number(value: float | None, what: str) -> float:
    if value is None or not math.isfinite(value) or value <= 0:
        raise UsageError(f"{what} must be a finite number > 0, got {value!r}")
    return value


def _figures(kind: str, result, folder: str | None) -> list[str]:
    if not folder:
        return []
    from pathlib import Path

    from assistant.report import field_figures as ff

    out = Path(folder)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise UsageError(f"--plots {folder}: cannot create the folder ({exc.strerror})") from None
    if kind == "tip":
        return [str(p) for p in ff.write_tip_figures(result.calibration, out, pixel_m=result.image.pixel_m,
                                                     gradient_n_per_m=result.image.gradient_n_per_m)]
    return [str(p) for p in ff.write_field_figures(result.field_map, out)]


def tip(args) -> int:
    from assistant.procedures.quantitative import calibrate_tip_file
    from assistant.procedures.quantitative_inputs import QuantitativeInputError

    ms = _number(args.ms_ka_per_m, "--ms-ka-per-m") * 1e3
    t = _number(args.thickness_nm, "--thickness-nm") * 1e-9
    ms_std = None if args.ms_std_ka_per_m is None else args.ms_std_ka_per_m * 1e3
    t_std = None if args.thickness_std_nm is None else args.thickness_std_nm * 1e-9
    if not args.out.lower().endswith(".npz"):
        raise UsageError(f"--out {args.out}: the tip file must end in .npz")
    try:
        result = calibrate_tip_file(args.reference, ms_a_per_m=ms, thickness_m=t, out=args.out,
                                    ms_std_a_per_m=ms_std, thickness_std_m=t_std, tip_moment=args.tip_moment,
                                    probe=args.probe, record=_record() if args.probe else None,
                                    plane_std_m=args.plane_std_nm * 1e-9)
    except QuantitativeInputError as exc:
        raise UsageError(str(exc)) from None
    d = dict(result.summary)
    d["figures"] = _figures("tip", result, args.plots)
    d["conventions"] = CONVENTIONS
    if args.json:
        emit_json(d)
        return 0
    from assistant.formatting import number, quantity, span

    pp = ("dipole m = {0}, monopole q = {1}, offset = {2}".format(
        _pm(d["dipole_a_m2"], d["dipole_std_a_m2"], "A m²"), _pm(d["monopole_a_m"], d["monopole_std_a_m"], "A m"),
        _pm(d["offset_nm"], d["offset_std_nm"], "nm")))
    emit_text([f"tip file: {args.out}" + (f" (stored for probe {args.probe})" if args.probe else ""),
               f"valid band: periods {span(*d['band_nm'], 'nm')} (field maps taper off over its longest octave); "
               f"regularisation of the 2-D TTF figure {number(d['regularization'], digits=3)} (GCV; the profile "
               "and the maps do not use it)",
               f"measurement plane {quantity(d['measurement_plane_nm'], 'nm', d['plane_std_nm'] or None)}; "
               f"reference Ms = "
               f"{number(d['ms_ka_per_m'], d['ms_std_ka_per_m'])} kA/m, t = "
               f"{quantity(d['thickness_nm'], 'nm', d['thickness_std_nm'])}",
               f"point probe: {pp}", f"  {d['point_probe_verdict']}", *[f"warning: {w}" for w in d["warnings"]],
               *[f"note: {n}" for n in d["notes"]],
               *[f"figure: {f}" for f in d["figures"]], f"conventions: {CONVENTIONS}"])
    return 0


def _pm(value, std, unit: str) -> str:
    from assistant.formatting import DASH, number

    if value is None:
        return DASH
    if value == 0.0 and std is None:
        return "left out (see the verdict)"
    return f"{number(value, std, digits=3)} {unit}"


def field(args) -> int:
    from assistant.procedures.quantitative import map_field_file
    from assistant.procedures.quantitative_inputs import QuantitativeInputError

    if bool(args.tip) == bool(args.probe):
        raise UsageError("give either --tip TIP.npz or --probe NAME")
    if args.height_nm is not None and not (math.isfinite(args.height_nm) and args.height_nm > 0):
        raise UsageError(f"--height-nm {args.height_nm!r} must be a finite number > 0")
    if not args.out.lower().endswith(".npz"):
        raise UsageError(f"--out {args.out}: the field file must end in .npz")
    try:
        result = map_field_file(args.image, tip_path=args.tip, probe=args.probe, out=args.out,
                                height_m=None if args.height_nm is None else args.height_nm * 1e-9,
                                record=_record(), plane_std_m=args.plane_std_nm * 1e-9)
    except QuantitativeInputError as exc:
        raise UsageError(str(exc)) from None
    d = dict(result.summary)
    d["figures"] = _figures("field", result, args.plots)
    d["conventions"] = CONVENTIONS
    if args.json:
        emit_json(d)
        return 0
    from assistant.formatting import number, quantity, span

    emit_text([f"field file: {args.out}",
               f"Hz at {quantity(d['height_nm'], 'nm')} (measured at {quantity(d['measurement_plane_nm'], 'nm')}): "
               f"rms {number(d['hz_rms_a_per_m'])} A/m = {number(d['mu0_hz_rms_mt'])} mT (μ0 Hz); range "
               f"{number(d['hz_min_a_per_m'])} to {number(d['hz_max_a_per_m'])} A/m; median uncertainty "
               + (f"{number(d['hz_std_median_a_per_m'], digits=3)} A/m" if d["hz_std_median_a_per_m"] is not None
                  else "not stated (see the warning)"),
               f"periods {span(*d['band_nm'], 'nm')} (the TTF's valid band); statistics "
               + (f"beyond a {d['margin_px']} px edge margin" if d["statistics_beyond_margin"] else
                  "over the whole image, edges included"),
               *[f"warning: {w}" for w in d["warnings"]], *[f"note: {n}" for n in d["notes"]],
               *[f"figure: {f}" for f in d["figures"]], f"conventions: {CONVENTIONS}"])
    return 0
