"""``mfma analyze image``: magnetisation orientation and recorded-track metrics of one image."""

from __future__ import annotations

from pathlib import Path

from assistant.cli._common import UsageError, emit_json, emit_text
from assistant.formatting import number, quantity


def run(args) -> int:
    from assistant.procedures.media import analyse_image, closest_approach_m, load_image

    if args.thickness_nm is not None and not args.thickness_nm > 0:  # a film of no thickness has no field
        raise UsageError(f"--thickness-nm must be > 0 nm, got {quantity(args.thickness_nm, 'nm')}")
    for name in ("tip_offset_nm", "height_nm", "amplitude_nm"):
        value = getattr(args, name)
        if value is not None and not value >= 0:
            raise UsageError(f"--{name.replace('_', '-')} must be >= 0 nm, got {quantity(value, 'nm')}")
    image = load_image(args.file, series=args.series, height_nm=args.height_nm)
    result = analyse_image(image, thickness_m=None if args.thickness_nm is None else args.thickness_nm * 1e-9,
                           tip_offset_m=None if args.tip_offset_nm is None else args.tip_offset_nm * 1e-9,
                           amplitude_m=None if args.amplitude_nm is None else args.amplitude_nm * 1e-9)
    amp = image.amplitude_m if args.amplitude_nm is None else args.amplitude_nm * 1e-9
    plane = closest_approach_m(image, amp)
    figures = []
    if args.plots:
        from assistant.report.media_figures import write_media_figures

        figures = [str(p) for p in write_media_figures(image.phase_deg, result, Path(args.plots))]
    d = result.to_dict()
    d["image"] = {"source": image.source, "lift_nm": None if image.lift_m is None else image.lift_m * 1e9,
                  "amplitude_nm": None if amp is None else amp * 1e9,
                  "closest_approach_nm": None if plane is None else plane * 1e9,
                  "pixel_nm": [image.pixel_m[0] * 1e9, image.pixel_m[1] * 1e9]}
    if args.plots:
        d["figures"] = figures
    if args.json:
        emit_json(d)
    else:
        emit_text(_text(d, result))
    return 0


def _text(d: dict, result) -> list[str]:
    from assistant.report.media_report import track_rows
    from assistant.report.results import render_block

    pairs = [("image", d["image"]["source"]),
             ("orientation", f"{d['orientation']} (confidence {number(d['orientation_confidence'], digits=2)})")]
    if not result.has_tracks:
        return render_block(pairs, markdown=False) + [d["summary"]]
    rows = dict(track_rows(d))
    pairs += [("bit length", rows["bit length"]), ("track pitch", rows["track pitch"]),
              ("track width", rows["written track width"]),
              ("jitter", rows["transition jitter (rms about the bit-cell grid)"] + " rms about the bit-cell grid"),
              ("transition width", rows["transition width (arctan parameter)"]), ("erase band", rows["erase band"]),
              ("tracks, transitions", rows["tracks, transitions"])]
    return render_block(pairs, markdown=False) + list(result.sentences)
