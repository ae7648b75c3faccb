"""Stray-field maps in the session file (quantitative MFM): ``field_map/<series>/``.

One group per series that was mapped: ``hz_a_per_m`` and ``hz_std_a_per_m`` (rows, cols) as datasets, the scalars
(plane of the map, pixel spacing, valid band, edge margin, statistics, the TTF used) as attributes with their
units; NXdata with ``hz_a_per_m`` as the signal, so general HDF5 viewers show the map. A new map of a series
replaces the old one.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from assistant.storage.records import (Record, Scalar, SessionFileError, check_name, checked_record, fill_group,
                                       read_record)

__all__ = ["FIELD_MAP_GROUP", "FieldMapGroups"]

FIELD_MAP_GROUP = "field_map"


class FieldMapGroups:
    """The ``field_map/`` groups of :class:`~assistant.storage.session_file.SessionFile` (a mixin: it uses the
    file's ``_h5``, ``path`` and ``_writing``, the guard that refuses writes after a failed one)."""

    def write_field_map(self, name: str, scalars: Mapping[str, Scalar], arrays: Mapping[str, np.ndarray]) -> None:
        """Store a stray-field map of series ``name`` as ``field_map/<name>/`` (replacing an earlier one)."""
        check_name(name)
        record = checked_record(scalars, arrays, None)
        with self._writing(f"field map {name!r}"):
            parent = self._h5.require_group(FIELD_MAP_GROUP)
            parent.attrs["NX_class"] = "NXcollection"
            if name in parent:
                del parent[name]
            group = parent.create_group(name)
            fill_group(group, *record)
            if "hz_a_per_m" in record[1]:
                group.attrs["NX_class"] = "NXdata"
                group.attrs["signal"] = "hz_a_per_m"
                group.attrs["axes"] = [".", "."]

    def field_map_names(self) -> list[str]:
        """The series whose stray field is mapped in the file, sorted."""
        return sorted(self._h5[FIELD_MAP_GROUP]) if FIELD_MAP_GROUP in self._h5 else []

    def read_field_map(self, name: str) -> Record:
        if name not in self.field_map_names():
            raise SessionFileError(f"no field map {name!r} in {str(self.path)!r}; have {self.field_map_names()}")
        return read_record(self._h5[FIELD_MAP_GROUP][name])
