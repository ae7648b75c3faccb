"""``mfma analyze image``: magnetisation orientation and recorded-track metrics of one image."""

from __future__ import annotations

from pathlib import Path

from assistant.cli._common import UsageError, emit_json, emit_text


def run(args) -> int:
    from assistant.procedures.media import analyse_image, load_image

    for name in ("thickness_nm", "tip_offset_nm", "height_nm"):
        value = getattr(args, name)
        if value is not None and not value >= 0:
            raise UsageError(f"--{name.replace('_', '-')} must be >= 0, got {value:g}")
    image = load_image(args.file, series=args.series, height_nm=args.height_nm)
    result = analyse_image(image, thickness_m=None if args.thickness_nm is None else args.thickness_nm * 1e-9,
                           tip_offset_m=None if args.tip_offset_nm is None else args.tip_offset_nm * 1e-9)
    figures = []
    if args.plots:
        from assistant.report.media_figures import write_media_figures

        figures = [str(p) for p in write_media_figures(image.phase_deg, result, Path(args.plots))]
    d = result.to_dict()
    d["image"] = {"source": image.source, "lift_nm": None if image.lift_m is None else image.lift_m * 1e9,
                  "pixel_nm": [image.pixel_m[0] * 1e9, image.pixel_m[1] * 1e9]}
    if args.plots:
        d["figures"] = figures
    if args.json:
        emit_json(d)
    else:
        emit_text(_text(d, result))
    return 0


def _text(d: dict, result) -> list[str]:
    lines = [f"image: {d['image']['source']}",
             f"orientation: {d['orientation']} (confidence {d['orientation_confidence']:.2f})"]
    if not result.has_tracks:
        return lines + [d["summary"]]

    def nm(key, std=None):
        v, s = d[key], d.get(std) if std else None
        return "not measured" if v is None else (f"{v:.4g} ± {s:.2g} nm" if s else f"{v:.4g} nm")
    lines += [f"bit length:       {nm('bit_length_nm', 'bit_length_std_nm')}",
              f"track pitch:      {nm('track_pitch_nm', 'track_pitch_std_nm')}",
              f"track width:      {nm('track_width_nm', 'track_width_std_nm')}",
              f"jitter:           {nm('transition_jitter_nm')} rms about the bit-cell grid",
              f"transition width: {nm('transition_width_nm', 'transition_width_std_nm')}"
              + (" (upper bound, includes the tip)" if d["transition_width_includes_tip"] else ""),
              f"erase band:       {nm('erase_band_nm')}",
              f"tracks: {len(d['tracks'])}, transitions: {len(d['transitions'])}"]
    return lines + list(result.sentences)
