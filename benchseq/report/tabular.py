"""The report as a tidy CSV: one row per point, one column per quantity, SI units in the
header, and a ``source`` column naming the result file (always present, so one file and
several read the same way).

Header: ``name [unit]`` (``frequency [Hz]``, ``rejection_db [dB]``), a bare name when the
quantity has no unit (``point_id``, ``flags``). Complex columns are split into their real
and imaginary parts, ``pin_re [V]`` and ``pin_im [V]`` (not magnitude/phase: those would
not give the stored numbers back exactly). Floats are written with ``repr`` (the shortest
text that reads back to the same double), empty for nan; booleans as true/false. The last
three columns are the mask verdict: ``mask_limit [dB]``, ``mask_margin [dB]``,
``mask_outcome`` (see benchseq.verdict). ``read_report_csv`` reads the file back with the
stored types and the complex columns joined again.
"""

from __future__ import annotations

import csv
import io
import math
import re
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from benchseq.errors import BadInput
from benchseq.report.model import Report

SOURCE_COLUMN = "source"
VERDICT_COLUMNS = (
    ("mask_limit", "f8", "dB"),
    ("mask_margin", "f8", "dB"),
    ("mask_outcome", "str", ""),
)
_HEADER = re.compile(r"^(?P<name>.*?)(?: \[(?P<unit>[^\]]*)\])?$")


def _kind(series: pd.Series) -> str:
    dtype = series.dtype
    if pd.api.types.is_bool_dtype(dtype):
        return "bool"
    if pd.api.types.is_complex_dtype(dtype):
        return "c16"
    if pd.api.types.is_integer_dtype(dtype):
        return "i8"
    if pd.api.types.is_float_dtype(dtype):
        return "f8"
    return "str"


def _head(name: str, unit: str) -> str:
    return f"{name} [{unit}]" if unit else name


def _float_text(value: Any) -> str:
    number = float(value)
    return "" if math.isnan(number) else repr(number)


def _cell(kind: str, value: Any) -> list[str]:
    if kind == "c16":
        number = complex(value)
        return [_float_text(number.real), _float_text(number.imag)]
    if kind == "f8":
        return [_float_text(value)]
    if kind == "bool":
        return ["true" if bool(value) else "false"]
    if kind == "i8":
        return [str(int(value))]
    return ["" if value is None else str(value)]


def render_csv(report: Report) -> str:
    """The CSV text of every point of every source."""
    columns: dict[str, tuple[str, str]] = {}  # name -> (kind, unit), first appearance order
    for source in report.sources:
        units = source.frame.attrs.get("units", {})
        for name in source.frame.columns:
            columns.setdefault(name, (_kind(source.frame[name]), str(units.get(name, ""))))
    header = [SOURCE_COLUMN]
    for name, (kind, unit) in columns.items():
        if kind == "c16":
            header += [_head(f"{name}_re", unit), _head(f"{name}_im", unit)]
        else:
            header.append(_head(name, unit))
    header += [_head(name, unit) for name, _, unit in VERDICT_COLUMNS]
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    for source in report.sources:
        verdict = source.verdict.points
        present = set(source.frame.columns)
        for k, row in enumerate(source.frame.to_dict(orient="records")):
            cells = [str(source.path)]
            for name, (kind, _) in columns.items():
                if name in present:
                    cells += _cell(kind, row[name])
                else:
                    cells += ["", ""] if kind == "c16" else [""]
            outcome = verdict["outcome"].iloc[k] if k < len(verdict) else ""
            cells += [
                _float_text(verdict["limit_db"].iloc[k]) if k < len(verdict) else "",
                _float_text(verdict["margin_db"].iloc[k]) if k < len(verdict) else "",
                str(outcome),
            ]
            writer.writerow(cells)
    return buffer.getvalue()


def write_csv(report: Report, out: Path) -> list[Path]:
    from benchseq.report.output import write_atomic

    write_atomic(out, render_csv(report).encode("utf-8"))
    return [out]


# -- reading back -----------------------------------------------------------------------------
def _known_kinds() -> dict[str, str]:
    from benchseq.records import POINT_COLUMNS

    kinds: dict[str, str] = {c.name: c.kind for c in POINT_COLUMNS}
    kinds.update({name: kind for name, kind, _ in VERDICT_COLUMNS})
    kinds[SOURCE_COLUMN] = "str"
    return kinds


def _is_int(text: str) -> bool:
    return re.fullmatch(r"[+-]?\d+", text) is not None


def _is_float(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _infer(values: list[str]) -> str:
    filled = [v for v in values if v != ""]
    if filled and all(v in ("true", "false") for v in values):
        return "bool"
    if filled and all(_is_int(v) for v in values):
        return "i8"
    if all(_is_float(v) for v in filled):
        return "f8"
    return "str"


def _floats(values: list[str]) -> np.ndarray:
    return np.array([float(v) if v != "" else math.nan for v in values], dtype=np.float64)


def _convert(kind: str, values: list[str], where: str) -> np.ndarray:
    try:
        if kind == "bool":
            if any(v not in ("true", "false") for v in values):
                return _convert("str", values, where)
            return np.array([v == "true" for v in values], dtype=np.bool_)
        if kind == "i8":
            if any(not _is_int(v) for v in values):
                return _floats(values)  # a column missing in one of several files
            return np.array([int(v) for v in values], dtype=np.int64)
        if kind == "f8":
            return _floats(values)
    except ValueError as exc:
        raise BadInput(f"{where}: {exc}") from None
    return np.array(values, dtype=object)


def read_report_csv(path: str | Path) -> pd.DataFrame:
    """A report CSV back as a frame: the stored column names and types (complex joined),
    ``source`` first, the mask columns last; ``frame.attrs["units"]`` maps name -> unit."""
    path = Path(path)
    try:
        with open(path, newline="", encoding="utf-8") as handle:
            table = list(csv.reader(handle))
    except (OSError, UnicodeDecodeError) as exc:
        raise BadInput(f"cannot read the report CSV {path}: {exc}") from None
    if not table:
        raise BadInput(f"{path}: empty file (no header)")
    header, rows = table[0], table[1:]
    if any(len(r) != len(header) for r in rows):
        raise BadInput(f"{path}: rows do not all have {len(header)} cells")
    parsed = [_HEADER.match(h) for h in header]
    names = [m.group("name") if m else h for m, h in zip(parsed, header, strict=True)]
    units = [(m.group("unit") or "") if m else "" for m in parsed]
    cells = {k: [r[k] for r in rows] for k in range(len(header))}
    kinds = _known_kinds()
    data: dict[str, np.ndarray] = {}
    unit_of: dict[str, str] = {}
    k = 0
    while k < len(names):
        name = names[k]
        pair = name.endswith("_re") and k + 1 < len(names) and names[k + 1] == name[:-3] + "_im"
        if pair:
            base = name[:-3]
            joined = np.empty(len(rows), dtype=np.complex128)
            joined.real, joined.imag = _floats(cells[k]), _floats(cells[k + 1])
            data[base] = joined
            unit_of[base] = units[k]
            k += 2
            continue
        kind = kinds.get(name) or _infer(cells[k])
        data[name] = _convert(kind, cells[k], f"{path}: column {header[k]!r}")
        unit_of[name] = units[k]
        k += 1
    frame = pd.DataFrame(data, columns=list(data))
    frame.attrs["units"] = unit_of
    return frame
