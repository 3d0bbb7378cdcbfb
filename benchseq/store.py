"""Durable run results: a journal per point, consolidated into one self-describing HDF5 file.

A point is stored when ``RunWriter.append`` returns: its record is in the journal
(``RESULT.h5.journal``), written and fsync'd (see benchseq.journal). The HDF5 file is the
consolidated result (the journal's mirror), brought up to date from the journal every few
points during the run (``Consolidation``) and completed on finish: each update copies the
current file to a temporary file in the same directory, appends the new rows there, fsyncs
it and renames it over the old one, so the result on disk is always a whole, consistent file
and a reader holding the old one open never blocks the writer. Readers merge the journal's
points the HDF5 file does not hold yet, so a running or partial run loads in full. The
journal is kept after "complete" too (the record a damaged file is repaired from); the
complete HDF5 file holds everything (plan, bench, identities, rows, waveforms, truth).

The HDF5 layout is described in benchseq.h5layout, the row encoding and the errors live
in benchseq.rowcodec, the readers in benchseq.results; every public name stays importable
from here.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import errno
import json
import math
import os
import shutil
import signal
import socket
import time
import uuid
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from glob import escape as glob_escape
from pathlib import Path
from typing import TYPE_CHECKING, Any

from benchseq import journal as jr
from benchseq.h5layout import (
    COMPLEX_LAYOUT,
    DAMAGE_COUNT,
    DAMAGE_RANGES,
    FORMAT,
    FORMAT_VERSION,
    JOURNAL_SUFFIX,
    _append_rows,
    _column_group,
    _h5_rows,
    _h5_wave_dtypes,
    _H5State,
    _last_h5_row,
    _open_h5,
    _read_h5_state,
    _result_path,
    _Unreadable,
    _WaveformBatch,
    _write_meta,
    journal_path,
)
from benchseq.results import (
    ResultWarning,
    mirror_lag,
    read_meta,
    read_results,
    read_truth,
    read_waveforms,
)
from benchseq.rowcodec import _DTYPES as _DTYPES  # the tests read the column dtypes here
from benchseq.rowcodec import (
    BadResultFile,
    Column,
    DuplicatePoint,
    Kind,
    MissingPoint,
    OutputExists,
    ResultPathError,
    RowError,
    StoredWaveform,
    StoreError,
    StoreWriteError,
    _columns_from_json,
    _columns_to_json,
    _decode_row,
    _encode_row,
    _header_of,
    _infer_columns,
    _jsonable,
    _waveform_parts,
    _with_point_id,
)
from benchseq.writelock import ResultBusy, WriteLock, refuse_non_regular

if TYPE_CHECKING:
    import h5py

__all__ = [
    "COMPLEX_LAYOUT",
    "FORMAT",
    "FORMAT_VERSION",
    "JOURNAL_SUFFIX",
    "BadResultFile",
    "Column",
    "Consolidation",
    "DuplicatePoint",
    "Kind",
    "MissingPoint",
    "OutputExists",
    "RepairOutcome",
    "ResultBusy",
    "ResultPathError",
    "ResultWarning",
    "RowError",
    "RunWriter",
    "StoreError",
    "StoreWriteError",
    "StoredWaveform",
    "journal_path",
    "read_meta",
    "read_results",
    "read_truth",
    "read_waveforms",
    "repair_mirror",
]

_FINISH_STATES = ("complete", "stopped", "aborted")
_TMP_SUFFIX = ".tmp"
# Test hook: "ACTION:STAGE[,STAGE...]" makes the HDF5 update at STAGE (create, update, final;
# "-written" appended: after the temporary copy is complete, before it is renamed) either
# kill this process (ACTION "kill", SIGKILL) or fail as a full disk would ("enospc").
FAULT_ENV = "BENCHSEQ_STORE_FAULT"


@dataclass(frozen=True)
class Consolidation:
    """When the HDF5 file is brought up to date during a run (always on finish, resume and
    repair; the journal is the durable record and every reader merges its newer points).

    After a point, the file is updated when both hold:

    - the time since the last update is at least ``min_interval_s`` and at least the last
      update's duration / ``max_share`` (updates take at most that share of the run's wall
      time however large the file grows);
    - the journal appends since the last update took at least the last update's duration /
      ``cost_ratio`` (the update adds at most ``cost_ratio`` times the journal's own cost to
      each point's storage: a durable point costs at most 1 + ``cost_ratio`` journal
      appends), unless the file is ``max_lag_s`` behind (a bench whose points take many
      seconds still gets its file updated about once a minute).

    ``every_point`` forces an update after each point (tests).
    """

    max_share: float = 0.05
    min_interval_s: float = 0.0
    every_point: bool = False
    cost_ratio: float = 1.5
    max_lag_s: float = 60.0


def _utc_now() -> str:
    return dt.datetime.now(dt.UTC).isoformat(timespec="seconds")


def _fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDWR | getattr(os, "O_BINARY", 0))
    try:
        jr.fsync_fd(fd)
    finally:
        os.close(fd)


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
        self._journal_s = 0.0  # time spent in journal appends since the last update
        self._finished = False
        self._lock: WriteLock | None = None

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
        meta_items.setdefault("sessions", [_session_entry(0)])
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
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise ResultPathError(
                f"cannot create results at {path}: the folder {path.parent} cannot be made "
                f"({exc.strerror or exc})"
            ) from None
        for existing_path in (path, jpath):
            refuse_non_regular(existing_path)
        lock = _acquire_lock(path)
        try:
            writer = cls._create_locked(path, jpath, header, force, policy)
        except BaseException:
            lock.release()
            raise
        writer._lock = lock
        return writer

    @classmethod
    def _create_locked(
        cls,
        path: Path,
        jpath: Path,
        header: dict[str, Any],
        force: bool,
        policy: Consolidation | None,
    ) -> RunWriter:
        existing = [p for p in (path, jpath) if p.exists()]
        if existing and not force:
            raise OutputExists(
                f"{existing[0]} already exists; choose another result file or overwrite it "
                "with --force (force=True)"
            )
        remove_stale_temporaries(path)
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
            writer._consolidate("create")
        except StoreWriteError as exc:
            journal.close()
            with contextlib.suppress(OSError):
                jpath.unlink()
            raise ResultPathError(f"cannot create results at {path}: {exc}") from None
        return writer

    @classmethod
    def resume(cls, path: str | Path, *, policy: Consolidation | None = None) -> RunWriter:
        """Reopen an interrupted run: cut a torn journal tail, bring the HDF5 file up to date.

        Takes the result's write lock first (ResultBusy while another process writes it)
        and records the new session in the file's ``sessions`` list."""
        path = _result_path(path)
        for existing_path in (path, journal_path(path)):
            refuse_non_regular(existing_path)
        lock = _acquire_lock(path)
        try:
            remove_stale_temporaries(path)
            writer = cls._open_existing(path, policy, append=True)
            writer._lock = lock
            writer._start_session()
        except BaseException:
            lock.release()
            raise
        return writer

    @classmethod
    def _open_existing(cls, path: Path, policy: Consolidation | None, *, append: bool) -> RunWriter:
        """The writer of an existing result, its HDF5 file brought up to date from the journal
        (``append``: the journal reopened for new records, a torn tail cut off)."""
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
        usable_journal = scan is not None and _header_of(scan.records[0] if scan.records else None)
        try:
            if usable_journal and append:
                writer._journal = jr.JournalWriter.reopen(jpath, scan.valid_end)  # type: ignore[union-attr]
            if h5 is not None:
                writer._h5_valid = True
                writer._h5_ids = set(h5.ids)
                boundaries = {len(jr.FILE_MAGIC)} | {r.end for r in records}
                same = h5.journal_id == header["journal_id"] and h5.journal_offset in boundaries
                writer._h5_offset = h5.journal_offset if same else None
            if usable_journal:
                writer._consolidate()
            if append and writer._journal is None:  # no usable journal: a new one from the file
                header = _header_from_h5(_read_h5_state(path))  # type: ignore[arg-type]
                writer.journal_id = header["journal_id"]
                writer._journal = _new_journal(jpath, header, replace=True)
                writer._h5_offset = None
                writer._consolidate()
        except OSError as exc:
            writer.close()
            raise StoreWriteError(f"cannot resume {path}: {exc.strerror or exc}") from None
        except BaseException:
            writer.close()
            raise
        return writer

    def _start_session(self) -> None:
        """Close the record of an earlier session that ended without saying so (killed, power
        cut) and open this one, both in the ``sessions`` metadata list."""
        sessions = [dict(s) for s in self.meta.get("sessions") or [] if isinstance(s, dict)]
        if sessions and "ended" not in sessions[-1]:
            from benchseq.results import last_point_time

            sessions[-1].update(
                ended=last_point_time(self.path) or "unknown",
                status="interrupted",
                points_at_end=len(self._stored),
            )
        sessions.append(_session_entry(len(self._stored)))
        self.update_meta(sessions=sessions)

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

    def resumed_rows(self) -> list[dict[str, Any]]:
        """The rows stored before this writer was opened, in run order (resume brings the
        HDF5 file up to date from the journal first); call it before appending."""
        if not self._stored:
            return []
        return [row for row in _h5_rows(self.path, self.columns) if int(row["point_id"]) in self._stored]

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
        """End the run: record its status, complete the HDF5 file (the journal is kept)."""
        if status not in _FINISH_STATES:
            raise RowError(
                f"finish status must be one of {', '.join(_FINISH_STATES)}, not {status!r}"
            )
        final = {"status": status, "ended": _utc_now(), **items}
        sessions = [dict(x) for x in self.meta.get("sessions") or [] if isinstance(x, dict)]
        if sessions:
            sessions[-1].update(
                ended=final["ended"], status=status, points_at_end=len(self._stored)
            )
            final["sessions"] = sessions
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
            self._consolidate("final")
        finally:  # the ending is in the journal either way; readers merge it and a resume,
            self.close()  # `show` or `report` repairs the HDF5 file from it
        self._finished = True

    def close(self) -> None:
        """Release the journal and the write lock without finishing (the run stays resumable)."""
        if self._journal is not None:
            self._journal.close()
            self._journal = None
        if self._lock is not None:
            self._lock.release()
            self._lock = None

    def _check_open(self) -> None:
        if self._finished or self._journal is None:
            raise StoreError(f"{self.path}: the run is finished or closed; use resume to continue")

    def _write(self, body: dict[str, Any], blob: bytes = b"") -> None:
        assert self._journal is not None
        started = time.monotonic()
        try:
            self._journal.append(body, blob)
        except OSError as exc:
            what = f"point {body['id']}" if body.get("kind") == "point" else "metadata"
            raise StoreWriteError(
                f"{self.journal_file}: could not store {what}: {exc.strerror or exc}; "
                f"the {len(self._stored)} points stored before are intact (resume when fixed)"
            ) from None
        self._journal_s += time.monotonic() - started

    # -- consolidation ------------------------------------------------------------------
    def _maybe_consolidate(self) -> None:
        policy = self.policy
        if not policy.every_point:
            since = time.monotonic() - self._last_update_end
            if since < max(policy.min_interval_s, self._last_update_s / policy.max_share):
                return
            cheap_enough = self._journal_s * policy.cost_ratio >= self._last_update_s
            if not cheap_enough and since < policy.max_lag_s:
                return
        try:
            self._consolidate(durable=False)
        except StoreWriteError as exc:  # the point is durable; readers use the journal
            self.consolidation_error = str(exc)

    def _consolidate(self, stage: str = "update", *, durable: bool = True) -> None:
        """Bring the HDF5 file up to date from the journal: copy, append, fsync, rename.

        ``durable`` also fsyncs the folder after the rename. An update during a run skips
        that: the journal holds every point, so a power cut that loses the rename leaves the
        previous whole file, which readers merge with the journal and a resume or repair
        brings up to date. Finish, resume and repair make the rename durable (the journal
        may be deleted after a complete run)."""
        started = time.monotonic()
        tmp = self.path.with_name(f".{self.path.name}.{uuid.uuid4().hex[:8]}{_TMP_SUFFIX}")
        try:
            _fault_hook(stage)
            if self._h5_valid:
                shutil.copyfile(self.path, tmp)
            with _open_h5(tmp, "r+" if self._h5_valid else "w") as h5:
                new_ids, offset = self._bring_up_to_date(h5, fresh=not self._h5_valid)
                h5.flush()
            _fsync_file(tmp)
            _fault_hook(f"{stage}-written")
            os.replace(tmp, self.path)
            if durable:
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
        self._journal_s = 0.0
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
        waves = _WaveformBatch(h5)
        with open(self.journal_file, "rb") if scan else contextlib.nullcontext() as handle:
            for record in scan.records if scan else []:
                body = record.body
                if body.get("kind") != "point":
                    continue
                pid = int(body["id"])
                if pid in known or pid in new_ids:
                    continue
                new_ids.add(pid)
                rows.append(body["row"])
                if body.get("truth") is not None and truth is not None:
                    truth_rows.append(body["truth"])
                if body.get("waveforms"):
                    assert handle is not None  # records come only from an open journal
                    waves.add(pid, body["waveforms"], jr.read_blob(handle, record))
        waves.flush()
        _append_rows(points, self.columns, rows)
        if truth is not None and self.truth_columns:
            _append_rows(truth, self.truth_columns, truth_rows)
        offset = scan.valid_end if scan else None
        h5.attrs["journal_offset"] = offset if offset is not None else len(jr.FILE_MAGIC)
        h5.attrs["point_rows"] = points["point_id"].shape[0]
        if start is None:  # a new file, or one written from another journal
            h5.attrs["format"] = FORMAT
            h5.attrs["format_version"] = FORMAT_VERSION
            h5.attrs["run_id"] = self.run_id
            h5.attrs["journal_id"] = self.journal_id
            h5.attrs["complex_layout"] = COMPLEX_LAYOUT
        if scan is not None:
            _record_damage(h5, self.journal_file, scan, fresh)
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


def _fault_hook(stage: str) -> None:
    """The test hook named by FAULT_ENV (no-op unless that variable names ``stage``)."""
    spec = os.environ.get(FAULT_ENV, "")
    if not spec:
        return
    action, _, stages = spec.partition(":")
    if stage not in stages.split(","):
        return
    if action == "kill":
        os.kill(os.getpid(), signal.SIGKILL)
    elif action == "enospc":
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


def _acquire_lock(path: Path) -> WriteLock:
    try:
        return WriteLock.acquire(path)
    except OSError as exc:
        raise ResultPathError(
            f"cannot create results at {path}: its lock file cannot be made "
            f"({exc.strerror or exc}; check the folder is writable and has free space)"
        ) from None


def _session_entry(points_at_start: int) -> dict[str, Any]:
    return {
        "started": _utc_now(),
        "host": socket.gethostname(),
        "pid": os.getpid(),
        "points_at_start": points_at_start,
    }


def stale_temporaries(path: str | Path) -> list[Path]:
    """Temporary copies an update of ``path`` (or of its journal) left behind when killed."""
    path = Path(path)
    found: list[Path] = []
    for stem in (path.name, journal_path(path).name):
        found += path.parent.glob(f".{glob_escape(stem)}.*{_TMP_SUFFIX}")
    return sorted(p for p in found if p.is_file())


def remove_stale_temporaries(path: str | Path) -> list[Path]:
    """Remove them (call with the write lock held: no live writer is using one)."""
    removed = []
    for tmp in stale_temporaries(path):
        with contextlib.suppress(OSError):
            tmp.unlink()
            removed.append(tmp)
    return removed


@dataclass(frozen=True)
class RepairOutcome:
    """What ``repair_mirror`` found and did."""

    lagging: list[str]  # how the HDF5 file differed from the journal ([] when it did not)
    repaired: bool  # the HDF5 file was rebuilt from the journal
    temporaries_removed: int
    writer_active: bool  # another process holds the write lock: nothing was touched
    problem: str = ""  # why a needed repair could not be made (read-only folder...)

    def notices(self, path: str | Path) -> list[str]:
        """Plain sentences for the user (empty when there was nothing to say)."""
        out: list[str] = []
        if self.lagging and self.repaired:
            out.append(
                f"{path}: the HDF5 file lagged its journal ({'; '.join(self.lagging)}); "
                "repaired from the journal"
            )
        elif self.lagging:
            out.append(
                f"{path}: the HDF5 file is stale ({'; '.join(self.lagging)}) and could not be "
                f"repaired ({self.problem}); what is shown is read from the journal"
            )
        if self.temporaries_removed:
            out.append(
                f"{path}: removed {self.temporaries_removed} temporary copy(ies) an interrupted "
                "update left behind"
            )
        return out


def repair_mirror(path: str | Path) -> RepairOutcome:
    """Bring a result's HDF5 file in line with its journal when no writer is running.

    Does nothing while another process holds the write lock (its run keeps the file up to
    date). Otherwise removes stale temporaries and, when the HDF5 file misses points or
    metadata (status included) the journal holds, rebuilds it from the journal."""
    path = _result_path(path)
    for existing_path in (path, journal_path(path)):
        refuse_non_regular(existing_path)
    if not path.exists() and not journal_path(path).exists():
        return RepairOutcome([], False, 0, False)  # nothing to repair; readers say it is missing
    try:
        lock = WriteLock.acquire(path, patience_s=0.2)
    except ResultBusy:
        return RepairOutcome([], False, 0, True)
    except OSError as exc:  # e.g. a read-only folder: the lock file cannot be made
        return RepairOutcome(mirror_lag(path), False, 0, False, exc.strerror or str(exc))
    try:
        removed = len(remove_stale_temporaries(path))
        lagging = mirror_lag(path)  # now that no writer can change it
        if not lagging:
            return RepairOutcome([], False, removed, False)
        try:
            writer = RunWriter._open_existing(path, None, append=False)
        except StoreWriteError as exc:
            return RepairOutcome(lagging, False, removed, False, str(exc))
        writer.close()
        return RepairOutcome(lagging, True, removed, False)
    finally:
        lock.release()


def _record_damage(h5: h5py.File, jpath: Path, scan: jr.ScanResult, fresh: bool) -> None:
    """Keep in the file the damaged journal records an update met (a torn tail excepted:
    resume cuts it), so readers report them after the journal has moved on."""
    inside = [(a, b) for a, b in scan.damaged if b < scan.size]
    if not (fresh or inside) and DAMAGE_COUNT in h5.attrs:
        return  # nothing new: the file keeps what earlier updates recorded
    count = 0 if fresh else int(h5.attrs.get(DAMAGE_COUNT, 0))
    ranges = [] if fresh or not count else json.loads(h5.attrs[DAMAGE_RANGES])
    if inside:
        count += jr.unreadable_records(jpath, inside)
        ranges += [[a, b] for a, b in inside]
    h5.attrs[DAMAGE_COUNT] = count
    h5.attrs[DAMAGE_RANGES] = json.dumps(ranges)
