"""Durable run results: a journal per point, consolidated into one self-describing HDF5 file.

A point is stored when ``RunWriter.append`` returns: its record is in the journal
(``RESULT.h5.journal``), written and fsync'd (see benchseq.journal). The HDF5 file is the
consolidated result, brought up to date from the journal during the run and completed
on finish: each update copies the current file to a temporary file in the same
directory, appends the new rows there, fsyncs it and renames it over the old one, so the
result on disk is always a whole, consistent file and a reader holding the old one open
never blocks the writer. Readers merge the journal's points the HDF5 file does not hold
yet, so a partial run loads in full. On "complete" the journal is removed: the HDF5 file
then holds everything (plan, bench, identities, rows, waveforms, truth).

HDF5 layout (plain h5py, no pickles)::

    /                 attrs: format="benchseq-result", format_version, run_id, status,
                      every short scalar meta item, point_rows, journal_id, journal_offset
    /meta/json        the whole meta dict as JSON text (authoritative for read_meta)
    /meta/<key>       long text items (plan_text, bench_text) and nested items (JSON text)
    /points/<column>  one resizable 1-D dataset per column; attrs unit, description, kind;
                      the group's "columns" attr lists the order; point_id is a column
    /truth/<column>   the simulator's truth per point, same layout (simulated benches)
    /waveforms/<ch>/  samples: every point's record of channel <ch> end to end (chunked,
                      gzip); point_id, start, length, scale, offset, sample_interval: one
                      entry per point. value = samples[start:start+length] * scale + offset

Complex columns are stored as HDF5 complex128 (a compound of float64 fields "r" and "i",
h5py's native mapping): h5py reads them back as complex numbers.

File locking is never used (network drives often lack it): files are opened with
``locking=False`` and HDF5_USE_FILE_LOCKING=FALSE is set for older builds.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import math
import os
import shutil
import time
import uuid
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pandas as pd

from benchseq import journal as jr
from benchseq.errors import BadInput, BenchseqError

os.environ.setdefault("HDF5_USE_FILE_LOCKING", "FALSE")
import h5py  # after the locking switch, which older HDF5 builds read at open

FORMAT = "benchseq-result"
FORMAT_VERSION = 1
JOURNAL_SUFFIX = ".journal"
COMPLEX_LAYOUT = "complex128: HDF5 compound of float64 fields r (real) and i (imaginary)"
Kind = Literal["f8", "i8", "c16", "bool", "str"]
_DTYPES: dict[str, Any] = {
    "f8": np.float64,
    "i8": np.int64,
    "c16": np.complex128,
    "bool": np.bool_,
    "str": object,
}
_FINISH_STATES = ("complete", "stopped", "aborted")
_RESERVED_ATTRS = {"format", "format_version", "point_rows", "journal_id", "journal_offset"}
_ATTR_TEXT_LIMIT = 2048  # longer strings go to /meta datasets (attributes stay small)


class StoreError(BenchseqError):
    """Results could not be stored or read as asked."""


class StoreWriteError(StoreError):
    """Writing failed (disk full, I/O error); every point stored before is intact."""


class RowError(StoreError):
    """A row, truth or waveform given to the store does not fit the run's columns."""


class DuplicatePoint(RowError):
    """A point id that is already stored was appended again."""


class OutputExists(BadInput):
    """The result file (or its journal) exists and overwriting was not asked for."""


class ResultPathError(BadInput):
    """The result file cannot be created where asked (read-only, full, not a directory)."""


class BadResultFile(BadInput):
    """A file given as a result is missing, damaged or not a benchseq result."""


class MissingPoint(BadInput):
    """A point id asked for is not stored in the result."""


@dataclass(frozen=True)
class Column:
    """One column of the table of points: name, kind, SI unit ("" if none) and meaning."""

    name: str
    kind: Kind
    unit: str
    description: str

    def __post_init__(self) -> None:
        if self.kind not in _DTYPES:
            raise ValueError(f"column {self.name!r}: kind must be one of {sorted(_DTYPES)}")
        if not self.name or "/" in self.name or self.name.startswith("."):
            raise ValueError(f"column name {self.name!r} cannot name an HDF5 dataset")


@dataclass(frozen=True)
class StoredWaveform:
    """A raw record of one channel: value (in ``unit``) = samples * scale + offset."""

    samples: np.ndarray
    scale: float = 1.0
    offset: float = 0.0
    sample_interval: float = math.nan  # s
    unit: str = "V"

    def values(self) -> np.ndarray:
        """The record in ``unit`` (float64)."""
        return self.samples.astype(np.float64) * self.scale + self.offset


@dataclass(frozen=True)
class Consolidation:
    """When the HDF5 file is brought up to date during a run (always on finish).

    After a point, the file is updated when the time since the last update is at least
    ``min_interval_s`` and at least the last update's duration / ``max_share``: updates
    then cost at most that share of the run's wall time however large the file grows,
    and on a bench whose points take seconds the file is updated after every point.
    ``every_point`` forces an update after each point (tests).
    """

    max_share: float = 0.05
    min_interval_s: float = 0.0
    every_point: bool = False


def journal_path(path: str | Path) -> Path:
    """Where the journal of result ``path`` lives (beside it)."""
    return Path(str(path) + JOURNAL_SUFFIX)


def _result_path(path: str | Path) -> Path:
    text = str(path)
    return Path(text[: -len(JOURNAL_SUFFIX)] if text.endswith(JOURNAL_SUFFIX) else text)


def _open_h5(path: Path, mode: str) -> h5py.File:
    return h5py.File(path, mode, locking=False)


def _utc_now() -> str:
    return dt.datetime.now(dt.UTC).isoformat(timespec="seconds")


# -- values: JSON in the journal, arrays in HDF5 ------------------------------------------
def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return (
            value.item()
            if not isinstance(value, np.complexfloating)
            else _json_default(complex(value))
        )
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, complex):
        return [value.real, value.imag]
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"{type(value).__name__} is not JSON-able")


def _jsonable(items: Mapping[str, Any], what: str) -> dict[str, Any]:
    """``items`` as plain JSON types (numpy scalars and arrays converted), or RowError."""
    try:
        text = json.dumps(dict(items), default=_json_default, allow_nan=True)
    except (TypeError, ValueError) as exc:
        raise RowError(f"{what} must be JSON-able: {exc}") from None
    return json.loads(text)


def _encode(column: Column, value: Any, where: str) -> Any:
    kind = column.kind
    is_bool = isinstance(value, bool | np.bool_)
    is_complex = isinstance(value, complex | np.complexfloating)
    ok = True
    if kind == "f8":
        ok = isinstance(value, int | float | np.integer | np.floating) and not is_bool
        encoded: Any = float(value) if ok else None
    elif kind == "i8":
        ok = isinstance(value, int | np.integer) and not is_bool
        encoded = int(value) if ok else None
    elif kind == "c16":
        ok = (isinstance(value, int | float | np.number) or is_complex) and not is_bool
        number = complex(value) if ok else 0j
        encoded = [number.real, number.imag]
    elif kind == "bool":
        ok = is_bool
        encoded = bool(value) if ok else None
    else:
        ok = isinstance(value, str)
        encoded = value
    if not ok:
        raise RowError(
            f"{where}: column {column.name!r} ({kind}) cannot hold {value!r} "
            f"({type(value).__name__})"
        )
    return encoded


def _decode(kind: str, value: Any) -> Any:
    if kind == "c16":
        return complex(value[0], value[1])
    if kind == "f8":
        return float(value)
    return value


def _encode_row(
    columns: Sequence[Column], row: Mapping[str, Any], point_id: int, where: str
) -> dict[str, Any]:
    names = [c.name for c in columns]
    given = dict(row)
    if "point_id" in names:
        given.setdefault("point_id", point_id)
        if (
            not isinstance(given["point_id"], int | np.integer)
            or int(given["point_id"]) != point_id
        ):
            raise RowError(f"{where}: row point_id {given['point_id']!r} differs from {point_id}")
    missing = [n for n in names if n not in given]
    unknown = [k for k in given if k not in names]
    if missing or unknown:
        parts = [f"lacks {', '.join(missing)}"] if missing else []
        parts += [f"has unknown columns {', '.join(map(str, unknown))}"] if unknown else []
        raise RowError(f"{where}: " + "; ".join(parts))
    return {c.name: _encode(c, given[c.name], where) for c in columns}


def _infer_columns(values: Mapping[str, Any]) -> list[Column]:
    kinds: list[Column] = []
    for name, value in values.items():
        if isinstance(value, bool | np.bool_):
            kind: Kind = "bool"
        elif isinstance(value, int | np.integer):
            kind = "i8"
        elif isinstance(value, complex | np.complexfloating):
            kind = "c16"
        elif isinstance(value, str):
            kind = "str"
        else:
            kind = "f8"
        kinds.append(Column(str(name), kind, "", ""))
    if "point_id" not in values:
        kinds.insert(0, Column("point_id", "i8", "", "index of the point"))
    return kinds


def _columns_to_json(columns: Sequence[Column] | None) -> list[list[str]] | None:
    return None if columns is None else [[c.name, c.kind, c.unit, c.description] for c in columns]


def _columns_from_json(items: Any) -> list[Column] | None:
    return None if items is None else [Column(*map(str, item)) for item in items]


def _with_point_id(columns: Sequence[Column]) -> list[Column]:
    columns = list(columns)
    names = [c.name for c in columns]
    if len(set(names)) != len(names):
        raise RowError(f"duplicate column names in {names}")
    if "point_id" not in names:
        columns.insert(0, Column("point_id", "i8", "", "index of the point in run order"))
    elif next(c for c in columns if c.name == "point_id").kind != "i8":
        raise RowError("column point_id must be of kind i8")
    return columns


def _waveform_parts(
    waveforms: Mapping[str, Any], where: str
) -> tuple[list[dict[str, Any]], list[bytes]]:
    """Journal descriptors and little-endian sample bytes of the waveforms of one point."""
    described: list[dict[str, Any]] = []
    blobs: list[bytes] = []
    position = 0
    for channel, item in waveforms.items():
        wave = item if isinstance(item, StoredWaveform) else StoredWaveform(np.asarray(item))
        samples = np.asarray(wave.samples)
        if not isinstance(channel, str) or not channel or "/" in channel or channel.startswith("."):
            raise RowError(f"{where}: waveform channel name {channel!r} is not usable")
        if samples.ndim != 1 or samples.dtype.kind not in "iuf":
            raise RowError(f"{where}: waveform {channel!r} must be a 1-D numeric array")
        samples = samples.astype(samples.dtype.newbyteorder("<"), copy=False)
        data = np.ascontiguousarray(samples).tobytes()
        described.append(
            {
                "channel": channel,
                "dtype": samples.dtype.str,
                "length": int(samples.size),
                "at": position,
                "scale": float(wave.scale),
                "offset": float(wave.offset),
                "sample_interval": float(wave.sample_interval),
                "unit": str(wave.unit),
            }
        )
        blobs.append(data)
        position += len(data)
    return described, blobs


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
            ds.attrs["unit"] = column.unit
            ds.attrs["description"] = column.description
            ds.attrs["kind"] = column.kind
    return group


def _append_rows(group: h5py.Group, columns: Sequence[Column], rows: list[dict]) -> None:
    if not rows:
        return
    for column in columns:
        values = [_decode(column.kind, row[column.name]) for row in rows]
        array = np.array(values, dtype=_DTYPES[column.kind])
        ds = group[column.name]
        n = ds.shape[0]
        ds.resize((n + len(rows),))
        ds[n:] = array


def _append_waveforms(h5: h5py.File, point_id: int, parts: list[dict], blob: bytes) -> None:
    for part in parts:
        group = h5.require_group("waveforms").require_group(part["channel"])
        dtype = np.dtype(part["dtype"])
        samples = np.frombuffer(blob, dtype=dtype, count=part["length"], offset=part["at"])
        if "samples" not in group:
            group.attrs["meaning"] = "value = samples[start:start+length] * scale + offset"
            group.attrs["unit"] = part["unit"]
            group.create_dataset(
                "samples", shape=(0,), maxshape=(None,), dtype=dtype, chunks=(1 << 15,),
                compression="gzip", compression_opts=4, shuffle=True,
            )  # fmt: skip
            for name, kind in (("point_id", "i8"), ("start", "i8"), ("length", "i8")):
                group.create_dataset(name, (0,), maxshape=(None,), chunks=(256,), dtype=kind)
            for name in ("scale", "offset", "sample_interval"):
                group.create_dataset(name, (0,), maxshape=(None,), chunks=(256,), dtype="f8")
            group["sample_interval"].attrs["unit"] = "s"
        store = group["samples"]
        start = store.shape[0]
        store.resize((start + samples.size,))
        store[start:] = samples.astype(store.dtype, copy=False)
        entry = {
            "point_id": point_id,
            "start": start,
            "length": samples.size,
            "scale": part["scale"],
            "offset": part["offset"],
            "sample_interval": part["sample_interval"],
        }
        for name, value in entry.items():
            ds = group[name]
            ds.resize((ds.shape[0] + 1,))
            ds[-1] = value


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


def _fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDWR | getattr(os, "O_BINARY", 0))
    try:
        jr.fsync_fd(fd)
    finally:
        os.close(fd)


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


def _group_columns(group: h5py.Group, where: str) -> list[Column]:
    try:
        names = json.loads(group.attrs["columns"])
        return [
            Column(n, str(group[n].attrs["kind"]), str(group[n].attrs["unit"]),
                   str(group[n].attrs["description"]))
            for n in names
        ]  # fmt: skip
    except (KeyError, ValueError, TypeError) as exc:
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
        if h5.attrs.get("format") != FORMAT:
            raise BadResultFile(f"{path} is an HDF5 file but not a benchseq result")
        try:
            meta = json.loads(h5["meta/json"].asstr()[()])
            columns = _group_columns(h5["points"], f"{path} /points")
            truth = _group_columns(h5["truth"], f"{path} /truth") if "truth" in h5 else None
            ids = {int(i) for i in h5["points/point_id"][:]}
            return _H5State(
                str(h5.attrs["run_id"]), str(h5.attrs["journal_id"]),
                int(h5.attrs["journal_offset"]), meta, columns, truth, ids,
            )  # fmt: skip
        except (KeyError, ValueError, OSError) as exc:
            raise _Unreadable(f"{path}: damaged benchseq result ({exc})") from None


def _header_of(record: jr.Record | None) -> dict[str, Any] | None:
    if record is None or record.body.get("kind") != "header":
        return None
    return record.body


class RunWriter:
    """Writes one run: ``append`` makes a point durable, ``finish`` completes the file."""

    def __init__(self, path: Path, header: dict[str, Any], policy: Consolidation) -> None:
        self.path = path
        self.journal_file = journal_path(path)
        self.run_id: str = header["run_id"]
        self.journal_id: str = header["journal_id"]
        self.meta: dict[str, Any] = dict(header["meta"])
        self.columns: list[Column] = _columns_from_json(header["columns"]) or []
        self.truth_columns = _columns_from_json(header.get("truth_columns"))
        self.policy = policy
        self.consolidation_error: str | None = None
        self._journal: jr.JournalWriter | None = None
        self._stored: set[int] = set()
        self._last_row: dict[str, Any] | None = None
        self._wave_dtypes: dict[str, str] = {}
        self._meta_revision = 0
        self._h5_valid = False
        self._h5_offset: int | None = None
        self._h5_ids: set[int] = set()
        self._h5_meta_revision = -1
        self._last_update_end = -math.inf
        self._last_update_s = 0.0
        self._finished = False

    # -- opening ------------------------------------------------------------------------
    @classmethod
    def create(
        cls,
        path: str | Path,
        meta: Mapping[str, Any],
        columns: Sequence[Column],
        force: bool = False,
        *,
        truth_columns: Sequence[Column] | None = None,
        policy: Consolidation | None = None,
    ) -> RunWriter:
        """Start a new result at ``path``; refuses an existing one unless ``force``."""
        path = Path(path)
        jpath = journal_path(path)
        meta_items = _jsonable(meta, "run metadata")
        header = {
            "kind": "header",
            "format": FORMAT,
            "format_version": FORMAT_VERSION,
            "run_id": str(meta_items.get("run_id") or uuid.uuid4()),
            "journal_id": uuid.uuid4().hex,
            "created": _utc_now(),
            "meta": meta_items,
            "columns": _columns_to_json(_with_point_id(columns)),
            "truth_columns": _columns_to_json(
                None if truth_columns is None else _with_point_id(truth_columns)
            ),
        }
        if path.is_dir():
            raise ResultPathError(f"{path} is a folder; give a result file name such as run.h5")
        existing = [p for p in (path, jpath) if p.exists()]
        if existing and not force:
            raise OutputExists(
                f"{existing[0]} already exists; choose another result file or overwrite it "
                "with --force (force=True)"
            )
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise ResultPathError(
                f"cannot create results at {path}: the folder {path.parent} cannot be made "
                f"({exc.strerror or exc})"
            ) from None
        try:
            journal = _new_journal(jpath, header, replace=force)
        except FileExistsError:
            raise OutputExists(f"{jpath} already exists (another run started?)") from None
        except OSError as exc:
            raise ResultPathError(
                f"cannot create results at {path}: {exc.strerror or exc} "
                "(check the folder exists, is writable and has free space)"
            ) from None
        writer = cls(path, header, policy or Consolidation())
        writer._journal = journal
        try:
            writer._consolidate()
        except StoreWriteError as exc:
            journal.close()
            with contextlib.suppress(OSError):
                jpath.unlink()
            raise ResultPathError(f"cannot create results at {path}: {exc}") from None
        return writer

    @classmethod
    def resume(cls, path: str | Path, *, policy: Consolidation | None = None) -> RunWriter:
        """Reopen an interrupted run: cut a torn journal tail, bring the HDF5 file up to date."""
        path = _result_path(path)
        jpath = journal_path(path)
        try:
            h5 = _read_h5_state(path)
        except _Unreadable:
            if not jpath.exists():
                raise
            h5 = None  # rebuilt from the journal
        scan = jr.scan(jpath) if jpath.exists() else None
        if scan is not None and not scan.has_file_magic and scan.size > 0:
            raise BadResultFile(f"{jpath} is not a benchseq journal")
        header = _header_of(scan.records[0]) if scan and scan.records else None
        if header is None and h5 is None:
            raise BadResultFile(f"{path}: no run to resume (no result file and no usable journal)")
        if header is not None and h5 is not None and header["run_id"] != h5.run_id:
            raise BadResultFile(f"{jpath} belongs to another run than {path}")
        if header is None:
            assert h5 is not None
            header = _header_from_h5(h5)
        writer = cls(path, header, policy or Consolidation())
        records = scan.records if scan else []
        writer._load_history(h5, records)
        try:
            if scan is not None and _header_of(scan.records[0] if scan.records else None):
                writer._journal = jr.JournalWriter.reopen(jpath, scan.valid_end)
            else:
                writer._journal = None
            if h5 is not None:
                writer._h5_valid = True
                writer._h5_ids = set(h5.ids)
                boundaries = {len(jr.FILE_MAGIC)} | {r.end for r in records}
                same = h5.journal_id == header["journal_id"] and h5.journal_offset in boundaries
                writer._h5_offset = h5.journal_offset if same else None
            if scan is not None:
                writer._consolidate()
            if writer._journal is None:  # no usable journal: start a new one from the file
                header = _header_from_h5(_read_h5_state(path))  # type: ignore[arg-type]
                writer.journal_id = header["journal_id"]
                writer._journal = _new_journal(jpath, header, replace=True)
                writer._h5_offset = None
                writer._consolidate()
        except OSError as exc:
            raise StoreWriteError(f"cannot resume {path}: {exc.strerror or exc}") from None
        return writer

    def _load_history(self, h5: _H5State | None, records: list[jr.Record]) -> None:
        if h5 is not None:
            self._stored |= h5.ids
            self.meta = {**h5.meta, **self.meta}
            self._h5_meta_revision = -1
            self._last_row = _last_h5_row(self.path, self.columns)
            self._wave_dtypes.update(_h5_wave_dtypes(self.path))
        for record in records:
            body = record.body
            if body.get("kind") == "meta":
                self.meta.update(body["items"])
                self._meta_revision += 1
            elif body.get("kind") == "truth_columns":
                self.truth_columns = _columns_from_json(body["columns"])
            elif body.get("kind") == "point":
                self._stored.add(int(body["id"]))
                self._last_row = _decode_row(self.columns, body["row"])
                for part in body.get("waveforms", []):
                    self._wave_dtypes.setdefault(part["channel"], part["dtype"])

    # -- writing ------------------------------------------------------------------------
    @property
    def stored_ids(self) -> set[int]:
        """Ids of the points already durable (a copy)."""
        return set(self._stored)

    def last_row(self) -> dict[str, Any] | None:
        """The row of the point stored last (in run order), or None."""
        return None if self._last_row is None else dict(self._last_row)

    def append(
        self,
        point_id: int,
        row: Mapping[str, Any],
        waveforms: Mapping[str, Any] | None = None,
        truth: Mapping[str, Any] | None = None,
    ) -> None:
        """Store one point; it is on stable storage when this returns.

        ``waveforms`` maps a channel name to a 1-D array or a StoredWaveform (with its
        scaling); ``truth`` is the simulator's truth for this point.
        """
        self._check_open()
        point_id = int(point_id)
        where = f"point {point_id}"
        if point_id in self._stored:
            raise DuplicatePoint(f"{where} is already stored in {self.path}")
        body: dict[str, Any] = {
            "kind": "point",
            "id": point_id,
            "row": _encode_row(self.columns, row, point_id, where),
        }
        if truth is not None:
            if self.truth_columns is None:
                inferred = _infer_columns(truth)
                self._write({"kind": "truth_columns", "columns": _columns_to_json(inferred)})
                self.truth_columns = inferred
            body["truth"] = _encode_row(self.truth_columns, truth, point_id, f"{where} truth")
        blob = b""
        if waveforms:
            parts, blobs = _waveform_parts(waveforms, where)
            for part in parts:
                known = self._wave_dtypes.get(part["channel"], part["dtype"])
                if known != part["dtype"]:
                    raise RowError(
                        f"{where}: waveform {part['channel']!r} is {part['dtype']}, "
                        f"earlier points stored {known}"
                    )
            body["waveforms"] = parts
            blob = b"".join(blobs)
        self._write(body, blob)
        self._stored.add(point_id)
        self._last_row = _decode_row(self.columns, body["row"])
        for part in body.get("waveforms", []):
            self._wave_dtypes.setdefault(part["channel"], part["dtype"])
        self._maybe_consolidate()

    def update_meta(self, **items: Any) -> None:
        """Record metadata changes (status, identities, end time...) durably."""
        self._check_open()
        clean = _jsonable(items, "metadata update")
        self._write({"kind": "meta", "items": clean})
        self.meta.update(clean)
        self._meta_revision += 1
        self._maybe_consolidate()

    def finish(
        self, status: str, traceback: str | None = None, reason: str | None = None, **items: Any
    ) -> None:
        """End the run: record its status, complete the HDF5 file (journal removed if complete)."""
        if status not in _FINISH_STATES:
            raise RowError(
                f"finish status must be one of {', '.join(_FINISH_STATES)}, not {status!r}"
            )
        final = {"status": status, "ended": _utc_now(), **items}
        if traceback is not None:
            final["traceback"] = traceback
        if reason is not None:
            final["reason"] = reason
        self._check_open()
        clean = _jsonable(final, "final metadata")
        assert self._journal is not None
        try:
            self._journal.append({"kind": "meta", "items": clean})
        except OSError as exc:  # e.g. the disk filled up: still say how the run ended
            self.close()
            tail = f"; the {len(self._stored)} points stored are intact (resume when fixed)"
            if "intact" in (reason or ""):
                tail = ""
            raise StoreWriteError(
                f"run {status}" + (f": {reason}" if reason else "") + " — recording the "
                f"ending in {self.journal_file.name} failed too ({exc.strerror or exc}){tail}"
            ) from None
        self.meta.update(clean)
        self._meta_revision += 1
        try:
            self._consolidate()
        finally:  # the ending is in the journal either way; readers merge it
            self.close()
        self._finished = True
        if status == "complete":
            with contextlib.suppress(FileNotFoundError):
                self.journal_file.unlink()
            jr.fsync_directory(self.path.parent)

    def close(self) -> None:
        """Release the journal without finishing (the run stays resumable)."""
        if self._journal is not None:
            self._journal.close()
            self._journal = None

    def _check_open(self) -> None:
        if self._finished or self._journal is None:
            raise StoreError(f"{self.path}: the run is finished or closed; use resume to continue")

    def _write(self, body: dict[str, Any], blob: bytes = b"") -> None:
        assert self._journal is not None
        try:
            self._journal.append(body, blob)
        except OSError as exc:
            what = f"point {body['id']}" if body.get("kind") == "point" else "metadata"
            raise StoreWriteError(
                f"{self.journal_file}: could not store {what}: {exc.strerror or exc}; "
                f"the {len(self._stored)} points stored before are intact (resume when fixed)"
            ) from None

    # -- consolidation ------------------------------------------------------------------
    def _maybe_consolidate(self) -> None:
        now = time.monotonic()
        wait = max(self.policy.min_interval_s, self._last_update_s / self.policy.max_share)
        if self.policy.every_point or now - self._last_update_end >= wait:
            try:
                self._consolidate()
            except StoreWriteError as exc:  # the point is durable; readers use the journal
                self.consolidation_error = str(exc)

    def _consolidate(self) -> None:
        """Bring the HDF5 file up to date from the journal: copy, append, fsync, rename."""
        started = time.monotonic()
        tmp = self.path.with_name(f".{self.path.name}.{uuid.uuid4().hex[:8]}.tmp")
        try:
            if self._h5_valid:
                shutil.copyfile(self.path, tmp)
            with _open_h5(tmp, "r+" if self._h5_valid else "w") as h5:
                new_ids, offset = self._bring_up_to_date(h5, fresh=not self._h5_valid)
                h5.flush()
            _fsync_file(tmp)
            os.replace(tmp, self.path)
            jr.fsync_directory(self.path.parent)
        except (OSError, RuntimeError) as exc:
            with contextlib.suppress(OSError):
                tmp.unlink()
            raise StoreWriteError(
                f"{self.path}: could not update the result file: {getattr(exc, 'strerror', None) or exc}; "
                f"every stored point is safe in {self.journal_file}"
            ) from None
        self._h5_valid = True
        self._h5_offset = offset
        self._h5_ids |= new_ids
        self._h5_meta_revision = self._meta_revision
        self._last_update_end = time.monotonic()
        self._last_update_s = self._last_update_end - started
        self.consolidation_error = None

    def _bring_up_to_date(self, h5: h5py.File, fresh: bool) -> tuple[set[int], int | None]:
        """Append the journal's points the file lacks; (their ids, journal offset reached)."""
        points = _column_group(h5, "points", self.columns)
        truth = _column_group(h5, "truth", self.truth_columns) if self.truth_columns else None
        start = None if fresh else self._h5_offset
        scan = jr.scan(self.journal_file, start) if self.journal_file.exists() else None
        rows: list[dict] = []
        truth_rows: list[dict] = []
        new_ids: set[int] = set()
        known = set() if fresh else self._h5_ids
        with open(self.journal_file, "rb") if scan else contextlib.nullcontext() as handle:
            for record in scan.records if scan else []:
                body = record.body
                pid = body.get("id")
                if body.get("kind") != "point" or pid in known or pid in new_ids:
                    continue
                new_ids.add(int(pid))
                rows.append(body["row"])
                if body.get("truth") is not None and truth is not None:
                    truth_rows.append(body["truth"])
                if body.get("waveforms"):
                    _append_waveforms(h5, int(pid), body["waveforms"], jr.read_blob(handle, record))
        _append_rows(points, self.columns, rows)
        if truth is not None and self.truth_columns:
            _append_rows(truth, self.truth_columns, truth_rows)
        h5.attrs["format"] = FORMAT
        h5.attrs["format_version"] = FORMAT_VERSION
        h5.attrs["run_id"] = self.run_id
        h5.attrs["journal_id"] = self.journal_id
        offset = scan.valid_end if scan else None
        h5.attrs["journal_offset"] = offset if offset is not None else len(jr.FILE_MAGIC)
        h5.attrs["point_rows"] = points["point_id"].shape[0]
        h5.attrs["complex_layout"] = COMPLEX_LAYOUT
        if fresh or self._h5_meta_revision != self._meta_revision:
            _write_meta(h5, self.meta)
        return new_ids, offset


def _new_journal(jpath: Path, header: dict[str, Any], replace: bool) -> jr.JournalWriter:
    """A journal holding ``header``; with ``replace`` built aside and renamed over the old one."""
    if not replace:
        journal = jr.JournalWriter.create(jpath)
        try:
            journal.append(header)
        except OSError:
            journal.close()
            with contextlib.suppress(OSError):
                jpath.unlink()
            raise
        return journal
    tmp = jpath.with_name(f".{jpath.name}.{uuid.uuid4().hex[:8]}.tmp")
    journal = jr.JournalWriter.create(tmp)
    try:
        journal.append(header)
        journal.close()
        os.replace(tmp, jpath)
        jr.fsync_directory(jpath.parent)
    except OSError:
        journal.close()
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
    return jr.JournalWriter.reopen(jpath, journal.size)


def _header_from_h5(h5: _H5State) -> dict[str, Any]:
    return {
        "kind": "header",
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "run_id": h5.run_id,
        "journal_id": uuid.uuid4().hex,
        "created": _utc_now(),
        "meta": h5.meta,
        "columns": _columns_to_json(h5.columns),
        "truth_columns": _columns_to_json(h5.truth_columns),
    }


def _decode_row(columns: Sequence[Column], row: Mapping[str, Any]) -> dict[str, Any]:
    return {c.name: _decode(c.kind, row[c.name]) for c in columns}


def _column_arrays(group: h5py.Group, columns: Sequence[Column], rows: slice) -> dict:
    out: dict[str, np.ndarray] = {}
    for c in columns:
        ds = group[c.name]
        out[c.name] = ds.asstr()[rows] if c.kind == "str" else ds[rows]
    return out


def _last_h5_row(path: Path, columns: Sequence[Column]) -> dict[str, Any] | None:
    with _open_h5(path, "r") as h5:
        if h5["points/point_id"].shape[0] == 0:
            return None
        arrays = _column_arrays(h5["points"], columns, slice(-1, None))
    return {name: values[0].item() if hasattr(values[0], "item") else values[0]
            for name, values in arrays.items()}  # fmt: skip


def _h5_wave_dtypes(path: Path) -> dict[str, str]:
    with _open_h5(path, "r") as h5:
        if "waveforms" not in h5:
            return {}
        return {ch: g["samples"].dtype.str for ch, g in h5["waveforms"].items()}


# -- reading ------------------------------------------------------------------------------
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
