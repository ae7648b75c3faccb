"""Storage: the crash-safe HDF5 session file (the file, its series and field-series groups, resume) and the
per-probe calibration record."""

from assistant.storage.field_series_group import FieldSeriesData, FieldSeriesWriter
from assistant.storage.probe_record import ProbeRecord, ProbeRecordError, default_data_dir
from assistant.storage.records import (
    FORMAT_NAME,
    FORMAT_VERSION,
    FinishedSeriesError,
    FormatVersionError,
    NotASessionFileError,
    Record,
    SessionBusyError,
    SessionFileError,
    SessionInfo,
    SessionWriteError,
    UnwritablePathError,
    redact_controller_url,
    unit_for_name,
)
from assistant.storage.resume import ResumePoint, resume_field_writer, resume_point, resume_writer
from assistant.storage.series_group import SeriesData, SeriesWriter
from assistant.storage.session_file import SessionFile

__all__ = [
    "FORMAT_NAME", "FORMAT_VERSION", "FieldSeriesData", "FieldSeriesWriter", "FinishedSeriesError",
    "FormatVersionError", "NotASessionFileError", "ProbeRecord", "ProbeRecordError", "Record", "ResumePoint",
    "SeriesData", "SeriesWriter", "SessionBusyError", "SessionFile", "SessionFileError", "SessionInfo",
    "SessionWriteError", "UnwritablePathError", "default_data_dir", "redact_controller_url", "resume_field_writer",
    "resume_point", "resume_writer", "unit_for_name",
]
