"""The probe record: each probe's calibration history, kept across sessions as one JSON file.

The file lives in the user data folder (``platformdirs.user_data_dir("mfm-assistant")``, or the folder named by
the environment variable ``MFMA_DATA_DIR``). Every change is written to a temporary file in the same folder and
moved into place with ``os.replace``, so a crash leaves either the old or the new record, never half of one.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from collections.abc import Mapping
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import platformdirs

from assistant.errors import AssistantError

ENV_DATA_DIR = "MFMA_DATA_DIR"
RECORD_FORMAT = "mfm-assistant-probe-record"
RECORD_VERSION = 1
_FILE_NAME = "probe_record.json"
TRANSFER_KEY = "tip_transfer"


class ProbeRecordError(AssistantError, ValueError):
    """The probe record cannot be read or a calibration cannot be added; the message names the problem."""


def default_data_dir() -> Path:
    """``$MFMA_DATA_DIR`` if set, else the platform's user data folder for mfm-assistant."""
    override = os.environ.get(ENV_DATA_DIR)
    return Path(override) if override else Path(platformdirs.user_data_dir("mfm-assistant"))


def _number(calibration: Mapping[str, Any], key: str) -> float | None:
    value = calibration.get(key)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        return None
    return float(value)


class TipTransferRecord:
    """Mixin of :class:`ProbeRecord`: each probe's tip transfer functions (TTF), newest last.

    The JSON record keeps, per TTF, its date, reference, band and point-probe numbers under ``tip_transfer``;
    the arrays (the TTF profile, its band and uncertainty, the reference image and pattern) stay in the tip file
    written by ``mfma analyze tip``, copied next to the record as ``tip_transfer/<probe>/<date>.npz`` so the
    record does not depend on where the user kept the original.
    """

    def tip_transfers(self, name: str) -> list[dict[str, Any]]:
        """The TTFs stored for probe ``name``, oldest first (empty if none)."""
        return [dict(e) for e in self._load_doc().get(TRANSFER_KEY, {}).get(name, [])]

    def tip_transfer_file(self, entry: Mapping[str, Any]) -> Path:
        """The stored tip file of a TTF entry."""
        return self.directory / str(entry["file"])

    def add_tip_transfer(self, probe_name: str, tip_file: str | os.PathLike[str], summary: Mapping[str, Any], *,
                         now: datetime | None = None) -> dict[str, Any]:
        """Copy ``tip_file`` next to the record and add an entry with ``summary`` (JSON values); returns it."""
        import shutil

        if not isinstance(probe_name, str) or not probe_name.strip():
            raise ProbeRecordError(f"probe name must be a non-empty string, got {probe_name!r}")
        stamp = (now or datetime.now(timezone.utc)).astimezone(timezone.utc)
        iso = stamp.isoformat(timespec="seconds").replace("+00:00", "Z")
        safe = "".join(c if c.isalnum() or c in "-_." else "_" for c in probe_name)
        relative = Path(TRANSFER_KEY) / safe / f"{stamp.strftime('%Y%m%dT%H%M%SZ')}.npz"
        entry = {key: _plain(v) for key, v in summary.items()}
        entry.update(recorded_utc=iso, file=relative.as_posix())
        try:
            json.dumps(entry, allow_nan=False)
        except (TypeError, ValueError) as exc:
            raise ProbeRecordError(f"TTF summary of {probe_name!r} is not plain JSON data: {exc}") from exc
        doc = self._load_doc()
        probes, transfers = doc.get("probes", {}), dict(doc.get(TRANSFER_KEY, {}))
        target = self.directory / relative
        try:
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(tip_file, target)
        except OSError as exc:
            raise ProbeRecordError(f"cannot store the tip file in {str(target.parent)!r}: {exc}") from exc
        transfers[probe_name] = [*transfers.get(probe_name, []), entry]
        self._save(probes, transfers)
        return entry


class ProbeRecord(TipTransferRecord):
    """Calibration history of every probe, oldest entry first, and each probe's TTFs (:class:`TipTransferRecord`).

    A change of k or f0 since the last session is reported when it exceeds ``coverage`` times the combined
    standard uncertainty of the two calibrations *and* a relative floor (``k_floor``, ``f0_floor``). The floor
    alone applies when an uncertainty is missing. The floors keep ordinary session-to-session scatter (mount,
    temperature) quiet; the defaults (3 % for k, 0.5 % for f0, coverage 2) are common practice, no source.
    """

    def __init__(self, directory: str | os.PathLike[str] | None = None, *, coverage: float = 2.0,
                 k_floor: float = 0.03, f0_floor: float = 0.005) -> None:
        self.directory = Path(directory) if directory is not None else default_data_dir()
        self.path = self.directory / _FILE_NAME
        self._coverage = coverage
        self._floors = {"k": k_floor, "f0": f0_floor}

    # ---- reading -------------------------------------------------------------------------------------
    def _load(self) -> dict[str, list[dict[str, Any]]]:
        return self._load_doc().get("probes", {})

    def _load_doc(self) -> dict[str, Any]:
        if not self.path.exists():
            return {}
        try:
            doc = json.loads(self.path.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise ProbeRecordError(f"probe record {str(self.path)!r} cannot be read: {exc}") from exc
        if not isinstance(doc, dict) or doc.get("format") != RECORD_FORMAT:
            raise ProbeRecordError(f"{str(self.path)!r} is not a probe record (format {doc.get('format')!r})"
                                   if isinstance(doc, dict) else f"{str(self.path)!r} is not a probe record")
        if doc.get("version") != RECORD_VERSION:
            raise ProbeRecordError(f"probe record {str(self.path)!r} has version {doc.get('version')!r}; "
                                   f"this software reads version {RECORD_VERSION}")
        for key in ("probes", TRANSFER_KEY):
            if not isinstance(doc.get(key, {}), dict):
                raise ProbeRecordError(f"probe record {str(self.path)!r}: {key!r} is not a mapping")
        return doc

    def names(self) -> list[str]:
        """Names of every recorded probe (calibrated, or with a stored TTF), sorted."""
        doc = self._load_doc()
        return sorted(set(doc.get("probes", {})) | set(doc.get(TRANSFER_KEY, {})))

    def history(self, name: str) -> list[dict[str, Any]]:
        """The calibrations of probe ``name``, oldest first (empty if the probe is unknown)."""
        return [dict(entry) for entry in self._load().get(name, [])]

    # ---- writing -------------------------------------------------------------------------------------
    def add(self, probe_name: str, calibration: Mapping[str, Any], *, now: datetime | None = None) -> list[str]:
        """Append a calibration of ``probe_name``; return warnings on k or f0 changes since the last one.

        ``calibration`` holds JSON-compatible values, at least ``k_n_per_m`` or ``f0_hz``; uncertainties as
        ``k_std_n_per_m`` and ``f0_std_hz``. Non-finite numbers are stored as null. A ``recorded_utc`` time
        stamp is added.
        """
        if not isinstance(probe_name, str) or not probe_name.strip():
            raise ProbeRecordError(f"probe name must be a non-empty string, got {probe_name!r}")
        if _number(calibration, "k_n_per_m") is None and _number(calibration, "f0_hz") is None:
            raise ProbeRecordError(f"calibration of {probe_name!r} holds neither a finite k_n_per_m nor f0_hz")
        entry = {key: _plain(v) for key, v in calibration.items()}
        stamp = (now or datetime.now(timezone.utc)).astimezone(timezone.utc)
        entry["recorded_utc"] = stamp.isoformat(timespec="seconds").replace("+00:00", "Z")
        try:
            json.dumps(entry, allow_nan=False)
        except (TypeError, ValueError) as exc:
            raise ProbeRecordError(f"calibration of {probe_name!r} is not plain JSON data: {exc}") from exc
        probes = self._load()
        previous = probes.get(probe_name, [])
        warnings = self._compare(probe_name, previous[-1], entry) if previous else []
        probes[probe_name] = [*previous, entry]
        self._save(probes)
        return warnings

    def changes(self, probe: str, old: Mapping[str, Any], new: Mapping[str, Any]) -> list[str]:
        """Warnings when k or f0 moved from calibration ``old`` to ``new`` beyond the record's limits."""
        return self._compare(probe, old, new)

    def _compare(self, probe: str, old: Mapping[str, Any], new: Mapping[str, Any]) -> list[str]:
        warnings = []
        checks = (("k", "k_n_per_m", "k_std_n_per_m", "N/m"), ("f0", "f0_hz", "f0_std_hz", "Hz"))
        for label, key, std_key, unit in checks:
            before, after = _number(old, key), _number(new, key)
            if before is None or after is None or before == 0.0:
                continue
            change = after - before
            floor = self._floors[label] * abs(before)
            s_old, s_new = _number(old, std_key), _number(new, std_key)
            combined = math.hypot(s_old, s_new) if s_old is not None and s_new is not None else None
            limit = floor if combined is None else max(floor, self._coverage * combined)
            if abs(change) <= limit:
                continue
            detail = (f"{abs(change) / combined:.1f} times the combined uncertainty {combined:.3g} {unit}"
                      if combined else f"beyond the {100 * self._floors[label]:.3g} % limit; no uncertainty known")
            warnings.append(f"probe {probe!r}: {label} moved from {before:.6g} to {after:.6g} {unit} "
                            f"({100 * change / before:+.2f} %, {detail}) since {old.get('recorded_utc', '?')}: "
                            f"{_likely_cause(label, change)}")
        return warnings

    def _save(self, probes: dict[str, list[dict[str, Any]]],
              transfers: dict[str, list[dict[str, Any]]] | None = None) -> None:
        if transfers is None:
            transfers = self._load_doc().get(TRANSFER_KEY, {})
        doc = {"format": RECORD_FORMAT, "version": RECORD_VERSION, "probes": probes}
        if transfers:
            doc[TRANSFER_KEY] = transfers
        try:
            self.directory.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(prefix=".probe_record.", suffix=".tmp", dir=self.directory)
        except OSError as exc:
            raise ProbeRecordError(f"cannot write the probe record in {str(self.directory)!r}: {exc}") from exc
        try:
            with os.fdopen(fd, "w", encoding="utf-8") as handle:
                json.dump(doc, handle, indent=1, sort_keys=True, allow_nan=False)
                handle.flush()
                os.fsync(handle.fileno())
            os.replace(tmp, self.path)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise


def _plain(value: Any) -> Any:
    """numpy scalars to Python ones; NaN and infinities (no JSON spelling) to None."""
    if hasattr(value, "dtype") and hasattr(value, "item"):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _likely_cause(label: str, change: float) -> str:
    if label == "f0":
        return ("a lower resonance suggests added mass (contamination) or damage" if change < 0
                else "a higher resonance suggests lost mass (coating or tip wear) or damage")
    return "check the lever for damage or wear, and the calibration inputs (length, width, temperature)"
