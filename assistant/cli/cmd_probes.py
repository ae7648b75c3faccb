"""``mfma probes [NAME]``: the probe record, each probe's calibration history."""

from __future__ import annotations

from assistant.cli._common import UsageError, emit_json, emit_text


def run(args) -> int:
    from assistant.storage.probe_record import ProbeRecord

    record = ProbeRecord()
    if args.name:
        if args.name not in record.names():
            raise UsageError(f"no probe named {args.name!r} in the record ({record.path})")
        history = record.history(args.name)
        if args.json:
            emit_json({"probe": args.name, "history": history})
        else:
            emit_text([f"{args.name}: {len(history)} calibration(s)"] + [
                f"  {h.get('calibrated_utc', '?')}  k = {h.get('k_n_per_m', float('nan')):.4g} N/m  "
                f"f0 = {h.get('f0_hz', float('nan')):.1f} Hz  Q = {h.get('q', float('nan')):.1f}  "
                f"InvOLS = {h.get('invols_nm_per_v', float('nan')):.2f} nm/V" for h in history])
        return 0
    names = record.names()
    if args.json:
        emit_json({"record": str(record.path), "probes": {n: len(record.history(n)) for n in names}})
    else:
        emit_text([f"probe record: {record.path}"] + [f"  {n}: {len(record.history(n))} calibration(s)"
                                                     for n in names] or ["  (empty)"])
    return 0
