"""The rows of a result as the store handles them: columns, stored waveforms, the store's
errors, and how rows, truth and waveforms become plain JSON (plus raw sample bytes) for the
journal and back.

Nothing here touches a file; benchseq.h5layout lays these values out in HDF5 and
benchseq.store writes them durably. Its public names are importable from benchseq.store.
"""

from __future__ import annotations

import json
import math
import zlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal, cast

import numpy as np

from benchseq import journal as jr
from benchseq.errors import BadInput, BenchseqError

Kind = Literal["f8", "i8", "c16", "bool", "str"]
_DTYPES: dict[str, Any] = {
    "f8": np.float64,
    "i8": np.int64,
    "c16": np.complex128,
    "bool": np.bool_,
    "str": object,
}


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

    @classmethod
    def from_stored(cls, name: str, kind: str, unit: str, description: str) -> Column:
        """A column as read back from a file; a kind outside Kind is refused as above."""
        return cls(name, cast(Kind, kind), unit, description)


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
    return None if items is None else [Column.from_stored(*map(str, item)) for item in items]


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


def _decode_row(columns: Sequence[Column], row: Mapping[str, Any]) -> dict[str, Any]:
    return {c.name: _decode(c.kind, row[c.name]) for c in columns}


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


# -- journal records -----------------------------------------------------------------------
def _header_of(record: jr.Record | None) -> dict[str, Any] | None:
    if record is None or record.body.get("kind") != "header":
        return None
    return record.body


def row_checksum(encoded_row: Mapping[str, Any]) -> int:
    """CRC-32 of a row's canonical journal JSON (sorted keys, no spaces, NaN as ``NaN``).

    The HDF5 file keeps it per row (``/points/row_crc32``): a reader re-encodes the row it
    read and compares, so a flipped bit in any column is caught."""
    text = json.dumps(dict(encoded_row), sort_keys=True, separators=(",", ":"), allow_nan=True)
    return zlib.crc32(text.encode("utf-8"))


def _canonical(kind: str, value: Any) -> Any:
    if kind == "c16":
        number = complex(value)
        return [number.real, number.imag]
    if kind == "f8":
        return float(value)
    if kind == "i8":
        return int(value)
    if kind == "bool":
        return bool(value)
    return value


def encoded_rows(columns: Sequence[Column], arrays: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Rows read from HDF5 column arrays, encoded as the journal encodes them."""
    lists = {c.name: list(arrays[c.name].tolist()) for c in columns}
    n = len(next(iter(lists.values()))) if lists else 0
    return [{c.name: _canonical(c.kind, lists[c.name][i]) for c in columns} for i in range(n)]
