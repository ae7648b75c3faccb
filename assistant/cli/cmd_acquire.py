"""``mfma acquire thermal|sweep``: raw records from a controller."""

from __future__ import annotations

from pathlib import Path

from assistant.cli._common import StderrProgress, UsageError, controller_for_command, emit_json, emit_text


def _out_path(text: str, suffix: str) -> Path:
    p = Path(text)
    if p.suffix.lower() != suffix:
        raise UsageError(f"--out {text!r} must end in {suffix}")
    if not p.parent.exists():
        raise UsageError(f"--out folder {p.parent} does not exist")
    return p


def thermal(args) -> int:
    from assistant.procedures.acquire import check_thermal_settings, thermal_chunks, write_npy_stream

    out = _out_path(args.out, ".npy")
    progress = StderrProgress(quiet=args.json)
    with controller_for_command(args) as ctl:
        samples = check_thermal_settings(ctl, seconds=args.seconds, rate_hz=args.rate)
        written = write_npy_stream(out, thermal_chunks(ctl, seconds=args.seconds, rate_hz=args.rate, sink=progress),
                                   samples)
    result = {"out": str(out), "samples": written, "rate_hz": args.rate, "seconds": written / args.rate,
              "units": "V"}
    emit_json(result) if args.json else emit_text([f"wrote {written} samples ({written / args.rate:g} s at "
                                                   f"{args.rate:g} Hz, volts) to {out}"])
    return 0


def sweep(args) -> int:
    import numpy as np

    from assistant.procedures.acquire import drive_sweep, frequency_grid

    out = _out_path(args.out, ".csv")
    freqs = frequency_grid(args.start, args.stop, args.points)
    progress = StderrProgress(quiet=args.json)
    with controller_for_command(args) as ctl:
        if args.drive_v > ctl.limits.drive_max_v:
            raise UsageError(f"--drive-v {args.drive_v:g} V exceeds the controller's {ctl.limits.drive_max_v:g} V")
        data = drive_sweep(ctl, freqs, args.drive_v, sink=progress)
    table = np.column_stack([data.frequency_hz, data.amplitude_v, data.phase_deg])
    np.savetxt(out, table, delimiter=",", header="frequency_hz,amplitude_v,phase_deg", comments="", fmt="%.10g")
    result = {"out": str(out), "points": int(freqs.size), "start_hz": args.start, "stop_hz": args.stop,
              "drive_v": args.drive_v}
    emit_json(result) if args.json else emit_text([f"wrote {freqs.size} points to {out}"])
    return 0
