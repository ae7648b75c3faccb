"""Storage: the crash-safe HDF5 session file and the per-probe calibration record."""

from assistant.storage.probe_record import ProbeRecord, ProbeRecordError, default_data_dir
from assistant.storage.session_file import (
    FORMAT_NAME,
    FORMAT_VERSION,
    FinishedSeriesError,
    FormatVersionError,
    NotASessionFileError,
    Record,
    SessionBusyError,
    SeriesData,
    SeriesWriter,
    SessionFile,
    SessionFileError,
    SessionInfo,
    SessionWriteError,
    UnwritablePathError,
    redact_controller_url,
    unit_for_name,
)

__all__ = [
    "FORMAT_NAME", "FORMAT_VERSION", "FinishedSeriesError", "FormatVersionError", "NotASessionFileError",
    "ProbeRecord", "ProbeRecordError", "Record", "SeriesData", "SeriesWriter", "SessionBusyError", "SessionFile",
    "SessionFileError", "SessionInfo", "SessionWriteError", "UnwritablePathError", "default_data_dir",
    "redact_controller_url", "unit_for_name",
]
