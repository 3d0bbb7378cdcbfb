"""One writer per result file: an OS lock on ``RESULT.h5.lock``, held for the whole run.

The writer takes an exclusive ``flock`` on the lock file beside the result and writes who
holds it (host, pid, start time) into it. The kernel drops the lock when the process ends,
however it ends (a SIGKILL or a power cut included), so a lock file left behind by a dead
run never blocks anyone: only a lock that is *held* refuses a second writer.

Readers never take the lock for long: ``writer_alive`` probes it with a shared,
non-blocking ``flock`` that is released at once, and a writer that meets such a probe
retries for up to ``ACQUIRE_PATIENCE_S``. On a file system without ``flock`` (some network
shares) the writer goes on unlocked and readers cannot tell a live writer from a dead one.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import errno
import json
import os
import socket
import stat
import time
from dataclasses import dataclass
from pathlib import Path

from benchseq.rowcodec import BadResultFile, StoreError

try:
    import fcntl
except ImportError:  # pragma: no cover - Windows: no flock; runs go on unlocked
    fcntl = None  # type: ignore[assignment]

LOCK_SUFFIX = ".lock"
ACQUIRE_PATIENCE_S = 2.0  # a reader's probe lasts microseconds; a writer holds for hours
_UNSUPPORTED = {errno.ENOLCK, errno.EOPNOTSUPP, errno.ENOSYS, errno.EINVAL}


class ResultBusy(StoreError):
    """Another process is writing this result file (its lock is held)."""

    exit_code = 2


def lock_path(result: str | Path) -> Path:
    """Where the lock of result ``result`` lives (beside it)."""
    return Path(str(result) + LOCK_SUFFIX)


def refuse_non_regular(path: Path, what: str = "result file") -> None:
    """BadResultFile when ``path`` exists and is not a regular file (a FIFO would hang open)."""
    try:
        mode = os.stat(path).st_mode
    except (FileNotFoundError, NotADirectoryError):
        return  # nothing there: whoever opens it says so
    except OSError as exc:
        raise BadResultFile(f"{path}: cannot be read ({exc.strerror or exc})") from None
    if stat.S_ISDIR(mode):
        raise BadResultFile(f"{path} is a folder, not a {what}")
    if not stat.S_ISREG(mode):
        kind = "a FIFO (named pipe)" if stat.S_ISFIFO(mode) else "not a regular file"
        raise BadResultFile(f"{path} is {kind}, not a {what}; refused without opening it")


@dataclass(frozen=True)
class Holder:
    """Who holds (or last held) a result's lock, as written in the lock file."""

    host: str
    pid: int
    started: str

    def describe(self) -> str:
        return f"process {self.pid} on {self.host}, writing since {self.started}"


def read_holder(result: str | Path) -> Holder | None:
    """The holder written in the lock file, None when missing or unreadable."""
    path = lock_path(result)
    try:
        refuse_non_regular(path, "lock file")
        data = json.loads(path.read_text(encoding="utf-8"))
        return Holder(str(data["host"]), int(data["pid"]), str(data["started"]))
    except (OSError, ValueError, KeyError, TypeError, BadResultFile):
        return None


def _open_lock(path: Path) -> int:
    refuse_non_regular(path, "lock file")
    return os.open(path, os.O_RDWR | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0), 0o644)


def _same_inode(fd: int, path: Path) -> bool:
    """True when ``path`` still names the file ``fd`` is open on (not removed and remade)."""
    try:
        return os.path.samestat(os.fstat(fd), os.stat(path))
    except OSError:
        return False


class WriteLock:
    """The exclusive lock of one result file; ``release`` (or process end) frees it."""

    def __init__(self, result: Path, fd: int | None, holder: Holder) -> None:
        self.result = result
        self.path = lock_path(result)
        self.holder = holder
        self._fd = fd

    @property
    def held(self) -> bool:
        return self._fd is not None

    @classmethod
    def acquire(cls, result: str | Path, patience_s: float = ACQUIRE_PATIENCE_S) -> WriteLock:
        """Take the lock, or raise ResultBusy naming the process that holds it."""
        result = Path(result)
        path = lock_path(result)
        holder = Holder(
            socket.gethostname(),
            os.getpid(),
            dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
        )
        if fcntl is None:  # pragma: no cover - Windows
            return cls(result, None, holder)
        deadline = time.monotonic() + patience_s
        while True:
            fd = _open_lock(path)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError as exc:
                os.close(fd)
                if exc.errno in _UNSUPPORTED:
                    return cls(result, None, holder)  # no flock here: go on unlocked
                if exc.errno not in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                    raise
                if time.monotonic() >= deadline:
                    raise ResultBusy(busy_message(result)) from None
                time.sleep(0.02)  # a reader's probe: gone within microseconds
                continue
            if not _same_inode(fd, path):  # removed by its last holder meanwhile: retry
                os.close(fd)
                continue
            _write_holder(fd, holder)
            return cls(result, fd, holder)

    def release(self) -> None:
        """Remove the lock file and free the lock (idempotent)."""
        if self._fd is None:
            return
        with contextlib.suppress(OSError):
            if _same_inode(self._fd, self.path):
                self.path.unlink()
        os.close(self._fd)
        self._fd = None


def _write_holder(fd: int, holder: Holder) -> None:
    text = json.dumps({"host": holder.host, "pid": holder.pid, "started": holder.started})
    with contextlib.suppress(OSError):  # the lock itself is what matters
        os.ftruncate(fd, 0)
        os.pwrite(fd, (text + "\n").encode("utf-8"), 0)


def busy_message(result: Path) -> str:
    holder = read_holder(result)
    who = holder.describe() if holder else "another process (its details are unreadable)"
    return (
        f"{result} is being written by {who}; one writer per result file. Wait for that run "
        f"to end (or stop it), or choose another result file. Nothing was changed."
    )


def writer_alive(result: str | Path) -> bool | None:
    """True while some process holds the result's lock, False when none does, None when
    this file system cannot tell (no flock)."""
    path = lock_path(result)
    if fcntl is None:  # pragma: no cover - Windows
        return None
    try:
        refuse_non_regular(path, "lock file")
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0))
    except FileNotFoundError:
        return False
    except (OSError, BadResultFile):
        return None
    try:
        fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
    except OSError as exc:
        if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
            return True
        return None
    finally:
        os.close(fd)  # closing drops the shared lock at once
    return False
