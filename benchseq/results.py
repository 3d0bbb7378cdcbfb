"""Reading results back: the table of points, the truth, the metadata and the raw records
of a point, from the HDF5 file merged with the journal points it does not hold yet (so a
partial run loads in full). Its public names are importable from benchseq.store.

What a reader notices is said, never skipped silently: damaged journal records, a journal
header that cannot be read, an HDF5 row whose checksum fails (the journal's copy is used
when the journal holds it; without it the read fails naming the points), each as a
``ResultWarning``. A "running" file whose writer is gone (its lock is free) reads as
"interrupted", with when its last point was stored and how many points it holds.
"""

from __future__ import annotations

import datetime as dt
import math
import os
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from benchseq import journal as jr
from benchseq.h5layout import (
    CHECKSUM_NAME,
    _column_arrays,
    _H5State,
    _open_h5,
    _read_h5_state,
    _result_path,
    _Unreadable,
    journal_path,
    units_of,
)
from benchseq.rowcodec import (
    _DTYPES,
    BadResultFile,
    Column,
    MissingPoint,
    StoredWaveform,
    _columns_from_json,
    _decode,
    _decode_row,
    _header_of,
    encoded_rows,
    row_checksum,
)
from benchseq.writelock import refuse_non_regular, writer_alive


class ResultWarning(UserWarning):
    """Something a reader of a result file must be told (damage found, a value replaced)."""


@dataclass
class _Sources:
    """A result's HDF5 state plus the journal records it does not include yet."""

    path: Path
    h5: _H5State | None
    header: dict[str, Any] | None
    records: list[jr.Record]  # journal records newer than the HDF5 file (points: not in it)
    notices: list[str] = field(default_factory=list)

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
    refuse_non_regular(path)
    refuse_non_regular(jpath, "journal")
    try:
        h5 = _read_h5_state(path)
    except _Unreadable:
        if not jpath.is_file():
            raise
        h5 = None
    first = jr.first_record(jpath) if jpath.is_file() else None
    header = _header_of(first)
    notices: list[str] = []
    if header is None and jpath.is_file() and jpath.stat().st_size > len(jr.FILE_MAGIC):
        lost = sum(1 for r in jr.scan(jpath).records if r.body.get("kind") == "point")
        notices.append(
            f"{jpath}: the journal's header record is damaged; its {lost} point record(s) "
            "cannot be matched to this run and are left out"
        )
    if header is None and h5 is None:
        if jpath.is_file():
            raise BadResultFile(
                f"{jpath} is not a usable benchseq journal and {path} is missing"
                + (f" ({notices[0]})" if notices else "")
            )
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
        notices += _damage_notices(jpath, scan, h5)
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
    return _Sources(path, h5, header, records, notices)


def _damage_notices(jpath: Path, scan: jr.ScanResult, h5: _H5State | None) -> list[str]:
    """'n records unreadable' for the damaged ranges of a scan (a torn tail included) and
    for those the HDF5 updates met earlier (recorded in the file)."""
    notices = []
    if h5 is not None and h5.journal_damage:
        count, ranges = h5.journal_damage
        notices.append(
            f"{jpath}: {count} journal record(s) unreadable (damaged at {_ranges_text(ranges)}, "
            "found when the HDF5 file was updated); the points in them are not in the result"
        )
    if scan.damaged:
        unreadable = jr.unreadable_records(jpath, scan.damaged)
        notices.append(
            f"{jpath}: {unreadable} journal record(s) unreadable (damaged or cut short at "
            f"{_ranges_text(scan.damaged)}); the points in them are not shown"
        )
    return notices


def _ranges_text(ranges: Sequence[Sequence[int]]) -> str:
    text = ", ".join(f"bytes {a}-{b}" for a, b in list(ranges)[:5])
    return text + (" ..." if len(ranges) > 5 else "")


def _warn(notices: Iterable[str]) -> list[str]:
    said = list(dict.fromkeys(notices))
    for notice in said:
        warnings.warn(notice, ResultWarning, stacklevel=3)
    return said


def _journal_rows(sources: _Sources, key: str) -> dict[int, dict[str, Any]]:
    """Every point's ``key`` ("row" or "truth") in the journal, by id (damage skipped)."""
    jpath = journal_path(sources.path)
    if sources.header is None or not jpath.is_file():
        return {}
    found: dict[int, dict[str, Any]] = {}
    for record in jr.scan(jpath).records:
        body = record.body
        if body.get("kind") == "point" and body.get(key) is not None:
            found.setdefault(int(body["id"]), body[key])
    return found


def _verified(
    sources: _Sources, group: Any, columns: Sequence[Column], key: str, arrays: dict
) -> tuple[dict, list[str]]:
    """The HDF5 rows checked against their stored checksums; a failing row is replaced by
    the journal's copy (with a notice) or, without one, raises BadResultFile."""
    if CHECKSUM_NAME not in group:
        return arrays, []  # written before rows were checksummed
    stored = group[CHECKSUM_NAME][:]
    rows = encoded_rows(columns, arrays)
    if len(stored) != len(rows):
        return arrays, [f"{sources.path} /{group.name.strip('/')}: checksum table length differs"]
    bad = [i for i, row in enumerate(rows) if row_checksum(row) != int(stored[i])]
    if not bad:
        return arrays, []
    journal = _journal_rows(sources, key)
    ids = [int(arrays["point_id"][i]) if "point_id" in arrays else i for i in bad]
    missing = [pid for i, pid in zip(bad, ids, strict=True)
               if pid not in journal or row_checksum(journal[pid]) != int(stored[i])]  # fmt: skip
    where = f"{sources.path} /{group.name.strip('/')}"
    if missing:
        raise BadResultFile(
            f"{where}: the row(s) of point(s) {', '.join(map(str, missing))} fail their checksum "
            "(the file is damaged) and the journal holds no good copy; restore the file from a "
            "backup"
        )
    for i, pid in zip(bad, ids, strict=True):
        good = _decode_row(columns, journal[pid])
        for c in columns:
            arrays[c.name] = np.array(arrays[c.name], copy=True)
            arrays[c.name][i] = good[c.name]
    return arrays, [
        f"{where}: the row(s) of point(s) {', '.join(map(str, ids))} fail their checksum (the "
        "HDF5 file is damaged there); the journal's copy is shown"
    ]


def _frame(sources: _Sources, group: str, columns: Sequence[Column], key: str) -> pd.DataFrame:
    arrays: dict[str, list[np.ndarray]] = {c.name: [] for c in columns}
    notices = list(sources.notices)
    if sources.h5 is not None:
        with _open_h5(sources.path, "r") as h5:
            if group in h5:
                try:
                    found = _column_arrays(h5[group], columns, slice(None))
                    found, damaged = _verified(sources, h5[group], columns, key, found)
                except (OSError, KeyError, ValueError, TypeError, MemoryError) as exc:
                    # damaged storage under h5py (a chunk, a datatype, a shape, a link)
                    raise BadResultFile(
                        f"{sources.path}: the HDF5 table /{group} cannot be read ({exc}): the "
                        "file is damaged (its journal, where kept beside it, still holds every "
                        "stored point as written)"
                    ) from None
                notices += damaged
                for name, values in found.items():
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
    frame.attrs["notices"] = _warn(notices)
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
    if meta.get("status") == "running" and writer_alive(sources.path) is False:
        _mark_interrupted(meta, sources)
    return meta


def _mark_interrupted(meta: dict[str, Any], sources: _Sources) -> None:
    """A "running" file nobody writes: say it was interrupted, when, and with how much."""
    count = len(sources.h5.ids if sources.h5 is not None else ()) + sum(1 for _ in sources.points())
    when = _last_point_time(sources)
    meta["status"] = "interrupted"
    meta["interrupted"] = {"last_point_at": when, "points_stored": count}
    if not meta.get("reason"):
        meta["reason"] = (
            "the run's process ended without recording an ending (killed, crashed or power "
            f"lost); last point stored {when or 'never'}; resume to continue"
        )
    sessions = [dict(s) for s in meta.get("sessions") or [] if isinstance(s, dict)]
    if sessions and "ended" not in sessions[-1]:
        sessions[-1].update(ended=when or "unknown", status="interrupted", points_at_end=count)
        meta["sessions"] = sessions


def _iso(unix_time: float) -> str:
    return dt.datetime.fromtimestamp(unix_time, dt.UTC).isoformat(timespec="seconds")


def _last_point_time(sources: _Sources) -> str | None:
    """When the last point was stored: the latest ``stored_at`` column value, else the time
    the journal was last written; None without points."""
    times: list[float] = []
    names = [c.name for c in sources.columns]
    if sources.h5 is not None and sources.h5.ids and "stored_at" in names:
        with _open_h5(sources.path, "r") as h5:
            times.append(float(np.nanmax(h5["points/stored_at"][:])))
    times += [float(r.body["row"].get("stored_at", math.nan)) for r in sources.points()]
    times = [t for t in times if math.isfinite(t)]
    if times:
        return _iso(max(times))
    has_points = bool(sources.h5 and sources.h5.ids) or any(True for _ in sources.points())
    jpath = journal_path(sources.path)
    if has_points and jpath.is_file():
        return _iso(os.stat(jpath).st_mtime)
    return None


def last_point_time(path: str | Path) -> str | None:
    """When the last point of ``path`` was stored (ISO 8601, UTC), None without points."""
    return _last_point_time(_sources(path))


def mirror_lag(path: str | Path) -> list[str]:
    """How the HDF5 file differs from the journal ([] when it holds everything the journal
    does): missing or unreadable, points it lacks, metadata (the status) it lacks."""
    path = _result_path(path)
    jpath = journal_path(path)
    if not jpath.is_file() or _header_of(jr.first_record(jpath)) is None:
        return []
    try:
        h5_exists = _read_h5_state(path) is not None
    except _Unreadable:
        return ["the HDF5 file is unreadable"]
    if not h5_exists:
        return ["the HDF5 file is missing"]
    sources = _sources(path)
    if sources.header is None:
        return []  # the journal belongs to another run: the HDF5 file is the result
    lag: list[str] = []
    points = sum(1 for _ in sources.points())
    if points:
        lag.append(f"{points} point(s) only in the journal")
    assert sources.h5 is not None
    merged = dict(sources.h5.meta)
    for record in sources.records:
        if record.body.get("kind") == "meta":
            merged.update(record.body["items"])
    if merged.get("status") != sources.h5.meta.get("status"):
        lag.append(f"status {sources.h5.meta.get('status')!r} where the journal says "
                   f"{merged.get('status')!r}")  # fmt: skip
    elif merged != sources.h5.meta:
        lag.append("metadata behind the journal")
    return lag


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
                        float(group["sample_interval"][i]), units_of(group, ""),
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


# -- reading a damaged file without crashing ---------------------------------------------------
PROBE_LIMIT_S = 120.0  # a child still reading after this long (plus 0.1 s per MB) is ended


def _read_everything(path: Path) -> None:
    """Every object's attributes and every dataset's values outside /waveforms (their
    attributes are read), as the readers would meet them."""
    import h5py

    limit = os.path.getsize(path) + 4096  # no dataset stores more than its file holds

    def visit(name: str, obj: Any) -> None:
        dict(obj.attrs.items())
        if (
            isinstance(obj, h5py.Dataset)
            and not name.startswith("waveforms")
            and obj.size * obj.dtype.itemsize <= limit  # a damaged shape: the readers say so
        ):
            obj[()]

    with h5py.File(path, "r", locking=False) as h5:
        dict(h5.attrs.items())
        h5.visititems(visit)


def check_readable(path: str | Path) -> None:
    """BadResultFile when reading ``path`` crashes the HDF5 library.

    libhdf5 can end the process with SIGSEGV on some damaged object headers (a flipped byte
    in a few of every thousand places of a result file), which no Python code can catch.
    The file is read once in a forked child first; if the child dies by a signal the file
    is refused, naming its journal where one is kept; so is a file whose reading does not
    end (some damage makes libhdf5 spin). Errors the library reports are left
    to the readers, which name them. Without fork (not POSIX), or for anything but a
    regular file, nothing is done."""
    import signal
    import time

    target = Path(path)
    if not hasattr(os, "fork") or not target.is_file():
        return
    with warnings.catch_warnings():
        # Python 3.12+ warns that fork() in a threaded process may deadlock the child; this
        # child only reads one file with h5py, and a child that hangs is ended (below)
        warnings.filterwarnings("ignore", message=r".*fork\(\)", category=DeprecationWarning)
        pid = os.fork()
    if pid == 0:  # the child: read, say nothing, leave without running any cleanup
        import faulthandler

        faulthandler.disable()  # its crash is the answer, not something to dump
        code = 0
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                _read_everything(target)
        except BaseException:
            code = 1  # an error the readers will report properly
        finally:
            os._exit(code)
    # the limit grows with the file (10 MB/s at the least: a slow network share)
    limit_s = PROBE_LIMIT_S + target.stat().st_size / 10e6
    deadline = time.monotonic() + limit_s
    while True:
        done, status = os.waitpid(pid, os.WNOHANG)
        if done:
            break
        if time.monotonic() > deadline:  # some damage makes libhdf5 read without end
            os.kill(pid, signal.SIGKILL)
            os.waitpid(pid, 0)
            raise BadResultFile(
                f"{target}: reading it did not end within {limit_s:.0f} s: the file is "
                f"damaged{_journal_hint(target)}"
            )
        time.sleep(0.01)
    if os.WIFSIGNALED(status):
        raise BadResultFile(
            f"{target}: the HDF5 library crashed reading it (signal "
            f"{os.WTERMSIG(status)}): the file is damaged{_journal_hint(target)}"
        )


def _journal_hint(target: Path) -> str:
    journal = journal_path(target)
    if not journal.exists():
        return ""
    return (
        f"; its journal {journal} still holds every stored point as written: move the "
        f"damaged file aside (rename it) and `benchseq show {target}` rebuilds it"
    )
