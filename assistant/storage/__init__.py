"""Storage: the crash-safe HDF5 session file (the file, its series and field-series groups, resume) and the
per-probe calibration record."""

from assistant.analysis._lazy import attach

# which module holds each public name: reading a probe record needs no h5py, writing a session does
__getattr__, __dir__ = attach(__name__, {
    "field_series_group": ("FieldSeriesData", "FieldSeriesWriter"),
    "probe_record": ("ProbeRecord", "ProbeRecordError", "default_data_dir"),
    "records": ("FORMAT_NAME", "FORMAT_VERSION", "FinishedSeriesError", "FormatVersionError",
                "NotASessionFileError", "Record", "SessionBusyError", "SessionFileError", "SessionInfo",
                "SessionWriteError", "UnwritablePathError", "redact_controller_url", "unit_for_name"),
    "resume": ("ResumePoint", "resume_field_writer", "resume_point", "resume_writer"),
    "series_group": ("SeriesData", "SeriesWriter"),
    "session_file": ("SessionFile",),
})

__all__ = [
    "FORMAT_NAME", "FORMAT_VERSION", "FieldSeriesData", "FieldSeriesWriter", "FinishedSeriesError",
    "FormatVersionError", "NotASessionFileError", "ProbeRecord", "ProbeRecordError", "Record", "ResumePoint",
    "SeriesData", "SeriesWriter", "SessionBusyError", "SessionFile", "SessionFileError", "SessionInfo",
    "SessionWriteError", "UnwritablePathError", "default_data_dir", "redact_controller_url", "resume_field_writer",
    "resume_point", "resume_writer", "unit_for_name",
]
