"""The media section of the session report: orientation and recorded-track metrics of each series' image."""

from __future__ import annotations

from pathlib import Path

from assistant.formatting import number, quantity

__all__ = ["media_lines", "media_section", "track_rows"]


def track_rows(d: dict) -> list[tuple[str, str]]:
    """(quantity, value) rows of the track metrics of an analysed image's dictionary (``TrackAnalysis.to_dict``),
    numbers with their units and uncertainties; shared by ``summary.md`` and ``mfma analyze image``."""
    def nm(key, std=None, digits=4):
        return quantity(d[key], "nm", d.get(std) if std else None, digits=digits) if d[key] is not None \
            else "not measured"
    width = nm("transition_width_nm", "transition_width_std_nm", 3)
    if d["transition_width_includes_tip"] and d["transition_width_nm"] is not None:
        width += " (upper bound: includes the tip)"
    return [("bit length", nm("bit_length_nm", "bit_length_std_nm")),
            ("track pitch", nm("track_pitch_nm", "track_pitch_std_nm")),
            ("written track width", nm("track_width_nm", "track_width_std_nm")),
            ("transition jitter (rms about the bit-cell grid)", nm("transition_jitter_nm", digits=3)),
            ("transition width (arctan parameter)", width),
            ("erase band", nm("erase_band_nm", digits=3)),
            ("tracks, transitions", f"{len(d['tracks'])}, {len(d['transitions'])}")]


def media_lines(result, source: str) -> list[str]:
    """Markdown lines for one analysed image."""
    d = result.to_dict()
    out = [f"Image: {source}.", "",
           f"- magnetisation orientation: **{d['orientation']}** (confidence "
           f"{number(d['orientation_confidence'], digits=2)})"]
    out += [f"  - {e}" for e in d["orientation_evidence"]]
    if not result.has_tracks:
        return out + [f"- recorded tracks: none. {d['summary']}", ""]
    out += ["", "| quantity | value |", "|---|---|"] + [f"| {name} | {value} |" for name, value in track_rows(d)]
    out += [""] + [f"- {s}" for s in result.sentences] + [""]
    return out


def media_section(session_path: str | Path, out_dir: str | Path, notes: list[str]) -> tuple[list[str], list[Path]]:
    """Analyse the image of each series (see :mod:`assistant.procedures.media`) and write its figures."""
    from assistant.procedures.media import analyse_image, load_image
    from assistant.report.media_figures import write_media_figures
    from assistant.storage.session_file import SessionFile

    with SessionFile.open(session_path, "r") as sf:
        names = sf.series_names()
    lines: list[str] = ["## Media: orientation and recorded tracks", ""]
    paths: list[Path] = []
    for name in names:
        try:
            image = load_image(session_path, series=name)
            result = analyse_image(image)
        except ValueError as exc:  # too few lines, too few pixels per bit: said in the section, not fatal
            lines += [f"Series {name}: {exc}", ""]
            continue
        except Exception as exc:  # one analysis must not cost the whole report
            notes.append(f"media analysis of {name!r} failed: {type(exc).__name__}: {exc}")
            continue
        if len(names) > 1:
            lines += [f"### Series {name}", ""]
        lines += media_lines(result, image.source)
        try:
            paths += write_media_figures(image.phase_deg, result, out_dir,
                                         prefix="media" if len(names) == 1 else f"{name}_media")
        except Exception as exc:
            notes.append(f"media figures of {name!r} failed: {type(exc).__name__}: {exc}")
    return (lines if len(lines) > 2 else []), paths
