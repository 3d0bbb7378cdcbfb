"""Reading results back: the table of points, the truth, the metadata and the raw records
of a point, from the HDF5 file merged with the journal points it does not hold yet (so a
partial run loads in full). Its public names are importable from benchseq.store.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from benchseq import journal as jr
from benchseq.h5layout import (
    _column_arrays,
    _H5State,
    _open_h5,
    _read_h5_state,
    _result_path,
    _Unreadable,
    journal_path,
)
from benchseq.rowcodec import (
    _DTYPES,
    BadResultFile,
    Column,
    MissingPoint,
    StoredWaveform,
    _columns_from_json,
    _decode,
    _header_of,
)


@dataclass
class _Sources:
    """A result's HDF5 state plus the journal records it does not include yet."""

    path: Path
    h5: _H5State | None
    header: dict[str, Any] | None
    records: list[jr.Record]  # journal records newer than the HDF5 file (points: not in it)

    @property
    def columns(self) -> list[Column]:
        if self.h5 is not None:
            return self.h5.columns
        assert self.header is not None
        return _columns_from_json(self.header["columns"]) or []

    @property
    def truth_columns(self) -> list[Column] | None:
        found = self.h5.truth_columns if self.h5 is not None else None
        if found is None and self.header is not None:
            found = _columns_from_json(self.header.get("truth_columns"))
        for record in self.records:
            if found is None and record.body.get("kind") == "truth_columns":
                found = _columns_from_json(record.body["columns"])
        return found

    def points(self) -> Iterable[jr.Record]:
        return (r for r in self.records if r.body.get("kind") == "point")


def _sources(path: str | Path) -> _Sources:
    path = _result_path(path)
    jpath = journal_path(path)
    try:
        h5 = _read_h5_state(path)
    except _Unreadable:
        if not jpath.is_file():
            raise
        h5 = None
    header = _header_of(jr.first_record(jpath)) if jpath.is_file() else None
    if header is None and h5 is None:
        if jpath.is_file():
            raise BadResultFile(f"{jpath} is not a usable benchseq journal and {path} is missing")
        raise BadResultFile(f"{path}: no such result file")
    if h5 is not None and header is not None and header.get("run_id") != h5.run_id:
        header = None  # a journal left from another run: the HDF5 file is the result
    records: list[jr.Record] = []
    if header is not None:
        same = h5 is not None and h5.journal_id == header.get("journal_id")
        start = h5.journal_offset if same and h5 is not None else None
        scan = jr.scan(jpath, start)
        if same and scan.damaged and scan.damaged[0][0] == start:  # offset off a boundary
            scan = jr.scan(jpath)
        known = h5.ids if h5 is not None else set()
        seen: set[int] = set()
        for record in scan.records:
            body = record.body
            if body.get("kind") == "point":
                pid = int(body["id"])
                if pid in known or pid in seen:
                    continue
                seen.add(pid)
            elif same and body.get("kind") == "meta" and record.start < (start or 0):
                continue
            records.append(record)
    return _Sources(path, h5, header, records)


def _frame(sources: _Sources, group: str, columns: Sequence[Column], key: str) -> pd.DataFrame:
    arrays: dict[str, list[np.ndarray]] = {c.name: [] for c in columns}
    if sources.h5 is not None:
        with _open_h5(sources.path, "r") as h5:
            if group in h5:
                for name, values in _column_arrays(h5[group], columns, slice(None)).items():
                    arrays[name].append(values)
    rows = [r.body[key] for r in sources.points() if r.body.get(key) is not None]
    for c in columns:
        extra = [_decode(c.kind, row[c.name]) for row in rows]
        arrays[c.name].append(np.array(extra, dtype=_DTYPES[c.kind]))
    data = {
        c.name: np.concatenate(arrays[c.name]).astype(_DTYPES[c.kind], copy=False) for c in columns
    }
    frame = pd.DataFrame(data, columns=[c.name for c in columns])
    frame.attrs["units"] = {c.name: c.unit for c in columns}
    frame.attrs["descriptions"] = {c.name: c.description for c in columns}
    return frame


def read_results(path: str | Path) -> pd.DataFrame:
    """The table of points (one row per stored point, in storage order), partial runs too.

    Complex columns are complex128; ``frame.attrs["units"]`` maps column -> SI unit.
    """
    sources = _sources(path)
    return _frame(sources, "points", sources.columns, "row")


def read_truth(path: str | Path) -> pd.DataFrame:
    """The simulator's truth per point (empty frame when the run stored none)."""
    sources = _sources(path)
    columns = sources.truth_columns or [Column("point_id", "i8", "", "index of the point")]
    return _frame(sources, "truth", columns, "truth")


def read_meta(path: str | Path) -> dict[str, Any]:
    """The run's metadata (as given at create, with every update and the final status)."""
    sources = _sources(path)
    meta: dict[str, Any] = dict(sources.h5.meta) if sources.h5 is not None else {}
    if sources.h5 is None and sources.header is not None:
        meta.update(sources.header["meta"])
    for record in sources.records:
        if record.body.get("kind") == "meta":
            meta.update(record.body["items"])
    return meta


def read_waveforms(path: str | Path, point_id: int) -> dict[str, StoredWaveform]:
    """The raw records of one point by channel ({} when the point was stored without)."""
    sources = _sources(path)
    point_id = int(point_id)
    if sources.h5 is not None and point_id in sources.h5.ids:
        found: dict[str, StoredWaveform] = {}
        with _open_h5(sources.path, "r") as h5:
            for channel, group in h5["waveforms"].items() if "waveforms" in h5 else []:
                hits = np.flatnonzero(group["point_id"][:] == point_id)
                if hits.size:
                    i = int(hits[0])
                    start, length = int(group["start"][i]), int(group["length"][i])
                    found[channel] = StoredWaveform(
                        group["samples"][start : start + length],
                        float(group["scale"][i]), float(group["offset"][i]),
                        float(group["sample_interval"][i]), str(group.attrs.get("unit", "")),
                    )  # fmt: skip
        return found
    for record in sources.points():
        if int(record.body["id"]) == point_id:
            with open(journal_path(sources.path), "rb") as handle:
                blob = jr.read_blob(handle, record)
            return {
                part["channel"]: StoredWaveform(
                    np.frombuffer(blob, np.dtype(part["dtype"]), part["length"], part["at"]).copy(),
                    part["scale"],
                    part["offset"],
                    part["sample_interval"],
                    part["unit"],
                )
                for part in record.body.get("waveforms", [])
            }
    raise MissingPoint(f"{sources.path}: point {point_id} is not stored")
