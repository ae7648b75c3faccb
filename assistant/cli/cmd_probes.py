"""``mfma probes [NAME]``: the probe record, each probe's calibration history."""

from __future__ import annotations

from assistant.cli._common import UsageError, emit_json, emit_text


def _calibration_line(h: dict) -> str:
    """One stored calibration; f0 to six digits, so that a drift of the resonance between sessions shows."""
    from assistant.formatting import number, quantity

    nan = float("nan")
    return (f"  {h.get('calibrated_utc', '?')}  k = {quantity(h.get('k_n_per_m', nan), 'N/m')}  "
            f"f0 = {quantity(h.get('f0_hz', nan), 'Hz', digits=6)}  Q = {number(h.get('q', nan))}  "
            f"InvOLS = {quantity(h.get('invols_nm_per_v', nan), 'nm/V')}")


def run(args) -> int:
    from assistant.storage.probe_record import ProbeRecord

    record = ProbeRecord()
    if args.name:
        if args.name not in record.names():
            raise UsageError(f"no probe named {args.name!r} in the record ({record.path})")
        history = record.history(args.name)
        transfers = record.tip_transfers(args.name)
        if args.json:
            emit_json({"probe": args.name, "history": history, "tip_transfer": transfers})
        else:
            emit_text([f"{args.name}: {len(history)} calibration(s)"] + [_calibration_line(h) for h in history]
                      + _transfer_lines(transfers))
        return 0
    names = record.names()
    if args.json:
        emit_json({"record": str(record.path), "probes": {n: len(record.history(n)) for n in names},
                   "tip_transfer": {n: len(record.tip_transfers(n)) for n in names if record.tip_transfers(n)}})
    else:
        lines = [f"probe record: {record.path}"]
        for n in names:
            history, transfers = record.history(n), record.tip_transfers(n)
            lines.append(f"  {n}: {len(history)} calibration(s)"
                         + (f", {len(transfers)} tip transfer function(s)" if transfers else "")
                         + (", the latest:" if history else ""))
            lines += ["  " + _calibration_line(history[-1])] if history else []
        emit_text(lines if names else lines + ["  (empty)"])
    return 0


def _transfer_lines(transfers: list[dict]) -> list[str]:
    """One line per stored TTF: date, reference, band, point-probe numbers."""
    if not transfers:
        return []
    from assistant.formatting import number, quantity, span

    lines = [f"{len(transfers)} tip transfer function(s) (quantitative MFM; newest last):"]
    for t in transfers:
        band = span(*t["band_nm"], "nm") if t.get("band_nm") else "?"
        m, q, d = t.get("dipole_a_m2"), t.get("monopole_a_m"), t.get("offset_nm")
        pp = (f"m = {number(m, digits=3)} A m², q = {number(q, digits=3)} A m, offset {quantity(d, 'nm', digits=3)}"
              if None not in (m, q, d) else "no point probe")
        lines.append(f"  {t.get('recorded_utc', '?')}  band {band}  {pp}  "
                     f"reference {t.get('reference', '?')}  file {t.get('file', '?')}")
    return lines
