"""The HDF5 layout of a result file: where the file and its journal live, the column groups,
appending rows and waveforms, writing the metadata, and reading back what a file holds.

Layout (plain h5py, no pickles)::

    /                 attrs: format="benchseq-result", format_version, run_id, status,
                      every short scalar meta item, point_rows, journal_id, journal_offset
    /meta/json        the whole meta dict as JSON text (authoritative for read_meta)
    /meta/<key>       long text items (plan_text, bench_text) and nested items (JSON text)
    /points/<column>  one resizable 1-D dataset per column; attrs units, description, kind;
                      the group's "columns" attr lists the order; point_id is a column and
                      the HDF5 dimension scale of every other dataset of the group
    /points/row_crc32 CRC-32 of each row's canonical journal JSON (not a column: a check)
    /truth/<column>   the simulator's truth per point, same layout (simulated benches)
    /waveforms/<ch>/  samples: every point's record of channel <ch> end to end (chunked,
                      gzip); point_id, start, length, scale, offset, sample_interval: one
                      entry per point (point_id their dimension scale); the group's attr
                      units is the unit of value = samples[start:start+length] * scale + offset

Complex columns are stored as HDF5 complex128 (a compound of float64 fields "r" and "i",
h5py's native mapping): h5py reads them back as complex numbers.

Units follow the common "units" attribute convention (CF conventions §3.1): the UDUNITS
symbol ("Hz", "V", "A", "s", "deg"), "" for a ratio or a count, and "dB" (not a UDUNITS
unit; common practice). Amplitudes say their convention and uncertainties their coverage
factor in parentheses ("V (peak)", "V (pp)", "V (rms)", "dB (k=1)"): a number means nothing
without it, so these stay readable to people at the cost of strict UDUNITS parsing. Files
written before the rename carry "unit"; readers accept both (``units_of``).

HDF5's own file locking is not used: every open passes ``locking=False``. Writers are
serialised by benchseq.writelock, and an update is written to a temporary copy renamed into
place, so a reader never needs a lock (network drives often lack one). Nothing is set in the
process environment.

benchseq.store brings the file up to date from the journal; benchseq.results reads it.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from benchseq.rowcodec import _DTYPES, BadResultFile, Column, _decode, row_checksum

FORMAT = "benchseq-result"
FORMAT_VERSION = 1
JOURNAL_SUFFIX = ".journal"
COMPLEX_LAYOUT = "complex128: HDF5 compound of float64 fields r (real) and i (imaginary)"
DAMAGE_COUNT = "journal_records_unreadable"  # damaged journal records met by the updates
DAMAGE_RANGES = "journal_damaged_ranges"  # their byte ranges, JSON [[start, end], ...]
_RESERVED_ATTRS = {
    "format", "format_version", "point_rows", "journal_id", "journal_offset",
    DAMAGE_COUNT, DAMAGE_RANGES,
}  # fmt: skip
CHECKSUM_NAME = "row_crc32"
CHECKSUM_MEANING = (
    "CRC-32 (zlib) of each row's canonical JSON as in the journal: keys sorted, separators "
    "',' and ':', complex as [real, imag], NaN as NaN; readers recompute and compare"
)
_ATTR_TEXT_LIMIT = 2048  # longer strings go to /meta datasets (attributes stay small)
UNITS_ATTR = "units"
_OLD_UNITS_ATTR = "unit"  # what files written before the "units" convention carry
ID_SCALE = "point_id"  # the dimension scale of every per-point dataset of a group
_WAVE_INDEX = ("start", "length", "scale", "offset", "sample_interval")


def journal_path(path: str | Path) -> Path:
    """Where the journal of result ``path`` lives (beside it)."""
    return Path(str(path) + JOURNAL_SUFFIX)


def _result_path(path: str | Path) -> Path:
    text = str(path)
    return Path(text[: -len(JOURNAL_SUFFIX)] if text.endswith(JOURNAL_SUFFIX) else text)


def _open_h5(path: Path, mode: str) -> h5py.File:
    return h5py.File(path, mode, locking=False)


# -- the HDF5 file -------------------------------------------------------------------------
def _column_group(h5: h5py.File, name: str, columns: Sequence[Column]) -> h5py.Group:
    group = h5.require_group(name)
    if "columns" not in group.attrs:
        group.attrs["columns"] = json.dumps([c.name for c in columns])
        group.attrs["id_column"] = "point_id"
        group.attrs["complex_layout"] = COMPLEX_LAYOUT
        for column in columns:
            dtype = h5py.string_dtype() if column.kind == "str" else _DTYPES[column.kind]
            ds = group.create_dataset(
                column.name, shape=(0,), maxshape=(None,), chunks=(256,), dtype=dtype
            )
            ds.attrs[UNITS_ATTR] = column.unit
            ds.attrs["description"] = column.description
            ds.attrs["kind"] = column.kind
        crc = group.create_dataset(
            CHECKSUM_NAME, shape=(0,), maxshape=(None,), chunks=(256,), dtype="u4"
        )
        crc.attrs["description"] = CHECKSUM_MEANING
    elif not group[ID_SCALE].is_scale:  # an older file (see the module's notes), resumed
        for column in columns:  # or repaired: brought to today's conventions
            _rename_units(group[column.name])
    _scale_by_point_id(group, [c.name for c in columns] + [CHECKSUM_NAME])
    return group


def _rename_units(obj: h5py.Group | h5py.Dataset) -> None:
    """An older file's "unit" attribute renamed "units" (same text)."""
    if _OLD_UNITS_ATTR in obj.attrs and UNITS_ATTR not in obj.attrs:
        obj.attrs[UNITS_ATTR] = obj.attrs[_OLD_UNITS_ATTR]
        del obj.attrs[_OLD_UNITS_ATTR]


def units_of(obj: h5py.Group | h5py.Dataset, default: str | None = None) -> str:
    """The "units" attribute of ``obj``, or an older file's "unit" (KeyError without either,
    unless a ``default`` is given)."""
    for name in (UNITS_ATTR, _OLD_UNITS_ATTR):
        if name in obj.attrs:
            return str(obj.attrs[name])
    if default is None:
        raise KeyError(f"{obj.name} has no {UNITS_ATTR!r} attribute")
    return default


def _scale_by_point_id(group: h5py.Group, names: Sequence[str]) -> None:
    """Make ``group``'s point_id an HDF5 dimension scale attached to dimension 0 of the
    datasets ``names`` (those present), unless it is one already. The attachments are object
    references inside the file: they survive resizes and the byte copy each update makes."""
    ids = group[ID_SCALE]
    if ids.is_scale:
        return
    ids.make_scale(ID_SCALE)
    for name in names:
        if name != ID_SCALE and name in group:
            group[name].dims[0].attach_scale(ids)


def _append_array(group: h5py.Group, name: str, values: np.ndarray) -> None:
    """Append ``values`` to the resizable 1-D dataset ``name`` of ``group``: one extent
    change and one write through h5py's low-level calls. An update appends to every column
    of a table, and the high-level ``resize`` + slice assignment costs several times more
    per call than these (it re-derives shape, dtype and selection each time)."""
    count = values.shape[0]
    if not count:
        return
    values = np.ascontiguousarray(values)
    dsid = h5py.h5d.open(group.id, name.encode())
    start = dsid.shape[0]
    dsid.set_extent((start + count,))
    file_space = dsid.get_space()
    file_space.select_hyperslab((start,), (count,))
    memory_space = h5py.h5s.create_simple((count,))
    dsid.write(memory_space, file_space, values, mtype=h5py.h5t.py_create(values.dtype))


def _column_array(kind: str, values: list[Any]) -> np.ndarray:
    if kind == "str":
        return np.array(values, dtype=h5py.string_dtype())
    return np.array(values, dtype=_DTYPES[kind])


def _append_rows(group: h5py.Group, columns: Sequence[Column], rows: list[dict]) -> None:
    """Append journal-encoded ``rows``, with their checksums when the group keeps them: one
    write per column for the whole batch."""
    if not rows:
        return
    if CHECKSUM_NAME in group:
        crcs = np.array([row_checksum(row) for row in rows], dtype=np.uint32)
        _append_array(group, CHECKSUM_NAME, crcs)
    for column in columns:
        values = [_decode(column.kind, row[column.name]) for row in rows]
        _append_array(group, column.name, _column_array(column.kind, values))


_WAVE_BATCH_BYTES = 16 << 20  # samples held before a batch of waveforms is written


class _WaveformBatch:
    """The waveforms of the points an update appends, written one batch per channel (the
    samples end to end, each index dataset in one write) rather than point by point; the
    samples held are bounded (``_WAVE_BATCH_BYTES``), so a rebuild from a long journal
    streams."""

    def __init__(self, h5: h5py.File) -> None:
        self.h5 = h5
        self._held: dict[str, list[tuple[int, dict, np.ndarray]]] = {}
        self._bytes = 0

    def add(self, point_id: int, parts: list[dict], blob: bytes) -> None:
        for part in parts:
            dtype = np.dtype(part["dtype"])
            samples = np.frombuffer(blob, dtype=dtype, count=part["length"], offset=part["at"])
            self._held.setdefault(part["channel"], []).append((point_id, part, samples))
            self._bytes += samples.nbytes
        if self._bytes >= _WAVE_BATCH_BYTES:
            self.flush()

    def flush(self) -> None:
        for held in self._held.values():
            group = _wave_group(self.h5, held[0][1])
            first = h5py.h5d.open(group.id, b"samples").shape[0]
            lengths = np.array([samples.size for _, _, samples in held], dtype=np.int64)
            starts = first + np.concatenate(([0], np.cumsum(lengths)[:-1])).astype(np.int64)
            dtype = group["samples"].dtype
            _append_array(
                group, "samples", np.concatenate([s.astype(dtype, copy=False) for *_, s in held])
            )
            index = {
                "point_id": np.array([pid for pid, _, _ in held], dtype=np.int64),
                "start": starts,
                "length": lengths,
                **{name: np.array([part[name] for _, part, _ in held], dtype=np.float64)
                   for name in ("scale", "offset", "sample_interval")},
            }  # fmt: skip
            for name, values in index.items():
                _append_array(group, name, values)
        self._held = {}
        self._bytes = 0


def _wave_group(h5: h5py.File, part: dict) -> h5py.Group:
    """The group of ``part``'s channel, made on first use (an older file's brought to
    today's conventions)."""
    group = h5.require_group("waveforms").require_group(part["channel"])
    if "samples" not in group:
        group.attrs["meaning"] = "value = samples[start:start+length] * scale + offset"
        group.attrs[UNITS_ATTR] = part["unit"]
        group.create_dataset(
            "samples", shape=(0,), maxshape=(None,), dtype=np.dtype(part["dtype"]),
            chunks=(1 << 15,), compression="gzip", compression_opts=4, shuffle=True,
        )  # fmt: skip
        for name, kind in (("point_id", "i8"), ("start", "i8"), ("length", "i8")):
            group.create_dataset(name, (0,), maxshape=(None,), chunks=(256,), dtype=kind)
        for name in ("scale", "offset", "sample_interval"):
            group.create_dataset(name, (0,), maxshape=(None,), chunks=(256,), dtype="f8")
        group["sample_interval"].attrs[UNITS_ATTR] = "s"
        _scale_by_point_id(group, _WAVE_INDEX)
    elif not group[ID_SCALE].is_scale:  # an older file's index, being resumed or repaired
        _rename_units(group)
        _rename_units(group["sample_interval"])
        _scale_by_point_id(group, _WAVE_INDEX)
    return group


def _write_meta(h5: h5py.File, meta: Mapping[str, Any]) -> None:
    if "meta" in h5:
        del h5["meta"]
    group = h5.create_group("meta")
    text_dtype = h5py.string_dtype()
    group.create_dataset("json", data=json.dumps(meta, allow_nan=True), dtype=text_dtype)
    for key, value in meta.items():
        if key in _RESERVED_ATTRS:
            continue
        if (isinstance(value, str) and len(value) <= _ATTR_TEXT_LIMIT) or isinstance(
            value, bool | int | float
        ):
            h5.attrs[key] = value
        elif isinstance(value, str) and "/" not in key and key != "json":
            group.create_dataset(key, data=value, dtype=text_dtype)
        elif value is not None and "/" not in key and key != "json":
            ds = group.create_dataset(key, data=json.dumps(value), dtype=text_dtype)
            ds.attrs["encoding"] = "json"


# -- reading a file's state ---------------------------------------------------------------
class _Unreadable(BadResultFile):
    """The HDF5 file exists but HDF5 cannot read it (damaged or not HDF5)."""


@dataclass
class _H5State:
    """What a consolidated HDF5 result holds (rows are not loaded here)."""

    run_id: str
    journal_id: str
    journal_offset: int
    meta: dict[str, Any]
    columns: list[Column]
    truth_columns: list[Column] | None
    ids: set[int]
    journal_damage: tuple[int, list[list[int]]] | None = None  # (records, byte ranges)


def _whole_text(value: str, what: str) -> str:
    """``value`` unless it holds bytes that were not UTF-8 (h5py hands an attribute's
    undecodable bytes over as lone surrogates): a damaged text is an error, not a label."""
    if any("\udc80" <= ch <= "\udcff" for ch in value):
        raise ValueError(f"{what} is not valid text")
    return value


def _group_columns(group: h5py.Group, where: str) -> list[Column]:
    try:
        names = json.loads(group.attrs["columns"])
        return [
            Column.from_stored(
                _whole_text(n, "a column name"),
                _whole_text(str(group[n].attrs["kind"]), f"{n}'s kind"),
                _whole_text(units_of(group[n]), f"{n}'s units"),
                _whole_text(str(group[n].attrs["description"]), f"{n}'s description"),
            )
            for n in names
        ]
    except (KeyError, ValueError, TypeError, OSError) as exc:
        raise BadResultFile(f"{where}: damaged column table ({exc})") from None


def _read_h5_state(path: Path) -> _H5State | None:
    """The consolidated file's state, None if it does not exist."""
    if not path.exists():
        return None
    if path.is_dir():
        raise BadResultFile(f"{path} is a folder, not a result file")
    try:
        h5 = _open_h5(path, "r")
    except OSError as exc:
        raise _Unreadable(f"{path} is not a readable HDF5 file ({exc})") from None
    with h5:
        try:
            stated = h5.attrs.get("format")
        except (KeyError, ValueError, OSError) as exc:  # a damaged attribute heap
            raise _Unreadable(f"{path}: damaged HDF5 attributes ({exc})") from None
        if stated != FORMAT:
            raise BadResultFile(f"{path} is an HDF5 file but not a benchseq result")
        try:
            meta = json.loads(h5["meta/json"].asstr()[()])
            columns = _group_columns(h5["points"], f"{path} /points")
            truth = _group_columns(h5["truth"], f"{path} /truth") if "truth" in h5 else None
            ids = {int(i) for i in h5["points/point_id"][:]}
            damage = None
            if int(h5.attrs.get(DAMAGE_COUNT, 0)):
                damage = (int(h5.attrs[DAMAGE_COUNT]), json.loads(h5.attrs[DAMAGE_RANGES]))
            return _H5State(
                str(h5.attrs["run_id"]), str(h5.attrs["journal_id"]),
                int(h5.attrs["journal_offset"]), meta, columns, truth, ids, damage,
            )  # fmt: skip
        except (KeyError, ValueError, OSError) as exc:
            raise _Unreadable(f"{path}: damaged benchseq result ({exc})") from None


# what numpy calls each column kind's stored values (h5py reads variable-length text as
# objects; bool is HDF5's enum of 0 and 1)
_NUMPY_KINDS = {"f8": "f", "i8": "iu", "c16": "c", "bool": "b", "str": "OSU"}


def _column_arrays(group: h5py.Group, columns: Sequence[Column], rows: slice) -> dict:
    """The columns' values at ``rows``. Every column has the point_id scale's length, and no
    table can hold more rows than its file has bytes (8 bytes a row at the least): a
    damaged shape is a ValueError here, before it can ask for gigabytes."""
    out: dict[str, np.ndarray] = {}
    length = group[ID_SCALE].shape[0] if ID_SCALE in group else None
    limit = os.path.getsize(group.file.filename) // 8 + 1
    for c in columns:
        ds = group[c.name]
        if not isinstance(ds, h5py.Dataset) or ds.ndim < 1:
            raise ValueError(f"{c.name} is not a table column")
        if ds.shape[0] > limit:
            raise ValueError(f"{c.name} claims {ds.shape[0]} rows, more than the file holds")
        if length is not None and ds.shape[0] != length:
            raise ValueError(f"{c.name} has {ds.shape[0]} rows, the table {length}")
        if ds.dtype.kind not in _NUMPY_KINDS[c.kind]:
            raise ValueError(f"{c.name} holds {ds.dtype}, not {c.kind} values")
        out[c.name] = ds.asstr()[rows] if c.kind == "str" else ds[rows]
    return out


def _last_h5_row(path: Path, columns: Sequence[Column]) -> dict[str, Any] | None:
    with _open_h5(path, "r") as h5:
        if h5["points/point_id"].shape[0] == 0:
            return None
        arrays = _column_arrays(h5["points"], columns, slice(-1, None))
    return {name: values[0].item() if hasattr(values[0], "item") else values[0]
            for name, values in arrays.items()}  # fmt: skip


def _h5_rows(path: Path, columns: Sequence[Column]) -> list[dict[str, Any]]:
    """Every stored row, in the order stored."""
    with _open_h5(path, "r") as h5:
        arrays = _column_arrays(h5["points"], columns, slice(None))
    names = list(arrays)
    lists = [arrays[n].tolist() for n in names]
    return [dict(zip(names, values, strict=True)) for values in zip(*lists, strict=True)]


def _h5_wave_dtypes(path: Path) -> dict[str, str]:
    with _open_h5(path, "r") as h5:
        if "waveforms" not in h5:
            return {}
        return {ch: g["samples"].dtype.str for ch, g in h5["waveforms"].items()}
