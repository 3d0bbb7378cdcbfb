"""`benchseq run` misused, through the command line: each mistake ends with a clear message
and exit code (2 bad input, 1 failure), never a traceback; nothing is switched on when the
mistake is known beforehand, nothing stored is lost or changed, and what can be resumed
resumes. Files and servers are on this machine only (tmp folders, 127.0.0.1)."""

from __future__ import annotations

import contextlib
import errno
import hashlib
import os
import re
import shutil
import socket
import subprocess
import sys
import tempfile
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from fakebench import Keeper

from benchseq import journal as jr
from benchseq.bench import load_bench
from benchseq.cli import main
from benchseq.runner import start_run
from benchseq.sim.server import tcp_bench_text
from benchseq.stopping import StopControl
from benchseq.store import journal_path, read_meta, read_results

ROOT = Path(__file__).resolve().parent.parent
PLANS = ROOT / "plans"
DEMO_FREQUENCIES = 'frequency = { from = "10 Hz", to = "1 MHz", per_decade = 3 }'


@pytest.fixture
def opened(monkeypatch: pytest.MonkeyPatch) -> Keeper:
    keeper = Keeper()
    monkeypatch.setattr("benchseq.drivers.session.open_session", keeper)
    monkeypatch.setenv("COLUMNS", "400")  # messages on one line, paths never wrapped
    return keeper


def _plan(folder: Path, frequencies: str, name: str = "small.toml", title: str = "") -> Path:
    text = (PLANS / "demo.toml").read_text(encoding="utf-8")
    assert DEMO_FREQUENCIES in text
    text = text.replace(DEMO_FREQUENCIES, f"frequency = [{frequencies}]")
    if title:
        text = re.sub(r'^title = "[^"]*"', f'title = "{title}"', text, count=1, flags=re.M)
    path = folder / name
    path.write_text(text, encoding="utf-8")
    return path


def _cli(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    return code, out, err


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _safe_order(session: Any) -> list[tuple[str, bool]]:
    return [(c.role, c.value) for c in session.simulator.log if c.what == "output"][-2:]


@pytest.fixture
def stopped_run(tmp_path: Path) -> Path:
    """A run of three frequencies stopped after its first point (journal kept)."""
    plan = _plan(tmp_path, '"1 kHz", "10 kHz", "100 kHz"')
    stop = StopControl()

    def emit(event: Any) -> None:
        if event.kind == "point_stored":
            stop.request("test stop")

    outcome, path = start_run(
        str(plan), None, str(tmp_path / "part.h5"), seed=4, emit=emit, stop=stop
    )
    assert outcome.status == "stopped" and journal_path(path).exists()
    return path


# -- resume against other files -------------------------------------------------------------
def test_resume_with_another_plan_is_refused_and_the_run_untouched(
    tmp_path: Path, stopped_run: Path, opened: Keeper, capsys: pytest.CaptureFixture[str]
) -> None:
    other = _plan(tmp_path, '"1 kHz", "10 kHz", "100 kHz"', "other.toml", title="Other plan")
    before = (_digest(stopped_run), _digest(journal_path(stopped_run)))
    code, _, err = _cli(capsys, "run", str(other), "--resume", str(stopped_run))
    assert code == 2
    assert str(other) in err and str(stopped_run) in err
    assert (_digest(stopped_run), _digest(journal_path(stopped_run))) == before
    assert opened.sessions == []


def test_resume_with_another_bench_is_refused_and_the_run_untouched(
    tmp_path: Path, stopped_run: Path, opened: Keeper, capsys: pytest.CaptureFixture[str]
) -> None:
    text = load_bench("sim:demo").text
    other = tmp_path / "other.bench.toml"
    other.write_text(text.replace("bay 2", "bay 5"), encoding="utf-8")
    assert other.read_text(encoding="utf-8") != text
    before = (_digest(stopped_run), _digest(journal_path(stopped_run)))
    code, _, err = _cli(capsys, "run", "--resume", str(stopped_run), "--bench", str(other))
    assert code == 2
    assert str(other) in err and str(stopped_run) in err
    assert (_digest(stopped_run), _digest(journal_path(stopped_run))) == before
    assert opened.sessions == []
    # and the same files as before do resume it
    code, _, _ = _cli(capsys, "run", "--resume", str(stopped_run))
    assert code == 0 and read_meta(stopped_run)["status"] == "complete"
    assert sorted(read_results(stopped_run)["point_id"]) == [0, 1, 2]


# -- where the result goes ----------------------------------------------------------------------
def test_existing_output_is_kept_without_force_and_replaced_with_it(
    tmp_path: Path, opened: Keeper, capsys: pytest.CaptureFixture[str]
) -> None:
    plan = _plan(tmp_path, '"1 kHz"')
    out = tmp_path / "r.h5"
    out.write_bytes(b"an earlier result, not to be lost\n")
    before = _digest(out)
    code, _, err = _cli(capsys, "run", str(plan), "--out", str(out))
    assert code == 2 and str(out) in err and "--force" in err
    assert _digest(out) == before and not journal_path(out).exists()
    assert opened.sessions == []
    code, _, _ = _cli(capsys, "run", str(plan), "--out", str(out), "--force")
    assert code == 0
    assert read_meta(out)["status"] == "complete" and len(read_results(out)) == 1


def test_a_left_journal_also_blocks_a_new_run(
    tmp_path: Path, stopped_run: Path, opened: Keeper, capsys: pytest.CaptureFixture[str]
) -> None:
    """A result file gone but its journal left (an interrupted run): not overwritten either."""
    plan = _plan(tmp_path, '"1 kHz"', "one.toml")
    stopped_run.unlink()
    before = _digest(journal_path(stopped_run))
    code, _, err = _cli(capsys, "run", str(plan), "--out", str(stopped_run))
    assert code == 2 and str(journal_path(stopped_run)) in err
    assert _digest(journal_path(stopped_run)) == before and opened.sessions == []


def test_read_only_folder_is_refused_before_anything_is_switched_on(
    tmp_path: Path,
    opened: Keeper,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """A folder on a read-only file system (EROFS from every create in it, as a read-only
    mount gives): exit 2, the folder named, no bench opened."""
    plan = _plan(tmp_path, '"1 kHz"')
    folder = tmp_path / "ro"
    folder.mkdir()
    real_open = os.open

    def read_only_open(path: Any, flags: int, *args: Any, **kwargs: Any) -> int:
        if str(path).startswith(str(folder)) and flags & (os.O_CREAT | os.O_WRONLY | os.O_RDWR):
            raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(path))
        return real_open(path, flags, *args, **kwargs)

    monkeypatch.setattr(os, "open", read_only_open)
    code, _, err = _cli(capsys, "run", str(plan), "--out", str(folder / "r.h5"))
    monkeypatch.setattr(os, "open", real_open)
    assert code == 2
    assert str(folder / "r.h5") in err and "Read-only file system" in err
    assert opened.sessions == [] and list(folder.iterdir()) == []


def test_folder_without_write_permission(
    tmp_path: Path, opened: Keeper, capsys: pytest.CaptureFixture[str]
) -> None:
    """A folder the user may not write to: mode 0555, or as root (whom permission bits do
    not bind) the file system's immutable attribute (chattr +i), or where that is not
    available the run made with an ordinary user's effective id (nobody, 65534), whom the
    mode binds: exit 2, no bench opened."""
    as_root = os.geteuid() == 0
    chattr = shutil.which("chattr") if as_root else None
    base = tmp_path
    if as_root:
        # a scratch folder an ordinary user can traverse, in case the run drops to one
        base = Path(tempfile.mkdtemp(prefix="benchseq-locked-"))
        base.chmod(0o755)
    plan = _plan(base, '"1 kHz"')
    plan.chmod(0o644)
    folder = base / "locked"
    folder.mkdir()
    out = folder / "r.h5"
    locked = (
        chattr is not None
        and subprocess.run([chattr, "+i", str(folder)], capture_output=True, timeout=10).returncode
        == 0
    )
    refusal = os.strerror(errno.EPERM if locked else errno.EACCES)
    if not locked:
        folder.chmod(0o555)
    drop = as_root and not locked
    if drop:  # load what the command renders with while the interpreter's files are readable
        assert _cli(capsys, "check", str(plan))[0] == 0
    try:
        if drop:
            os.seteuid(65534)
        try:
            code, _, err = _cli(capsys, "run", str(plan), "--out", str(out))
        finally:
            if drop:
                os.seteuid(0)
        assert list(folder.iterdir()) == []
    finally:
        if locked:
            subprocess.run([chattr or "chattr", "-i", str(folder)], timeout=10)
        folder.chmod(0o755)
        if as_root:
            shutil.rmtree(base, ignore_errors=True)
    assert code == 2, err
    assert str(out) in err and refusal in err
    assert opened.sessions == []


def test_disk_full_during_the_run_stops_safely_and_resumes_when_space_is_back(
    tmp_path: Path,
    opened: Keeper,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """ENOSPC from every write after the second point (journal appends and HDF5 updates):
    exit 1 naming the cause, the safe state reached in order, the two points stored before
    exactly as acknowledged, and resume completes the run once space is back."""
    plan = _plan(tmp_path, '"1 kHz", "3 kHz", "10 kHz", "30 kHz"')
    out = tmp_path / "full.h5"
    acknowledged: dict[int, dict[str, Any]] = {}
    full = {"now": False}
    real_append = jr.JournalWriter.append
    real_copy = shutil.copyfile

    def append(self: Any, body: dict[str, Any], blob: bytes = b"") -> tuple[int, int]:
        if body.get("kind") == "point" and len(acknowledged) >= 2:
            full["now"] = True
        if full["now"]:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        done = real_append(self, body, blob)
        if body.get("kind") == "point":
            acknowledged[int(body["id"])] = body["row"]
        return done

    def copyfile(source: Any, target: Any, *args: Any, **kwargs: Any) -> Any:
        if full["now"]:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_copy(source, target, *args, **kwargs)

    monkeypatch.setattr(jr.JournalWriter, "append", append)
    monkeypatch.setattr(shutil, "copyfile", copyfile)
    code, said, err = _cli(capsys, "run", str(plan), "--out", str(out), "--seed", "2")
    monkeypatch.setattr(jr.JournalWriter, "append", real_append)
    monkeypatch.setattr(shutil, "copyfile", real_copy)
    assert code == 1
    said += err  # the reason is an error message, or the run summary's when it gets printed
    assert os.strerror(errno.ENOSPC) in said and "2 points stored before are intact" in said
    assert _safe_order(opened.sessions[0]) == [("generator", False), ("supply", False)]
    stored = read_results(out).set_index("point_id").sort_index()
    assert sorted(stored.index) == sorted(acknowledged) == [0, 1]
    for pid, row in acknowledged.items():
        assert stored.loc[pid, "rejection_db"] == row["rejection_db"]
        assert stored.loc[pid, "pin"] == complex(*row["pin"])
    code, _, _ = _cli(capsys, "run", "--resume", str(out))
    assert code == 0 and read_meta(out)["status"] == "complete"
    final = read_results(out).set_index("point_id").sort_index()
    assert list(final.index) == [0, 1, 2, 3]
    np.testing.assert_array_equal(final.loc[[0, 1], "rejection_db"], stored["rejection_db"])


# -- a bench that does not answer ----------------------------------------------------------------
def _tcp_bench(folder: Path, port: int, timeout: str = "1 s") -> Path:
    """The demo bench with every instrument at TCPIP::127.0.0.1::<port>::SOCKET."""
    address = f"TCPIP::127.0.0.1::{port}::SOCKET"
    text = tcp_bench_text(load_bench("sim:demo").text, dict.fromkeys(
        ("generator", "supply", "scope"), address), "demo")  # fmt: skip
    text = text.replace(f'address = "{address}"', f'address = "{address}"\ntimeout = "{timeout}"')
    path = folder / "unanswered.bench.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _free_port() -> int:
    probe = socket.socket()
    probe.bind(("127.0.0.1", 0))
    port = probe.getsockname()[1]
    probe.close()
    return port


@contextlib.contextmanager
def _silent_server(heard: bytearray) -> Iterator[int]:
    """A TCP server on 127.0.0.1 that accepts and reads everything (into ``heard``), and
    never answers."""
    listener = socket.socket()
    listener.bind(("127.0.0.1", 0))
    listener.listen(8)
    listener.settimeout(0.1)
    stop = threading.Event()
    connections: list[socket.socket] = []

    def serve() -> None:
        while not stop.is_set():
            with contextlib.suppress(TimeoutError):
                conn, _ = listener.accept()
                conn.settimeout(0.05)
                connections.append(conn)
            for conn in list(connections):
                with contextlib.suppress(TimeoutError, OSError):
                    heard.extend(conn.recv(65536))

    worker = threading.Thread(target=serve, daemon=True)
    worker.start()
    try:
        yield listener.getsockname()[1]
    finally:
        stop.set()
        worker.join(timeout=5)
        for conn in connections:
            conn.close()
        listener.close()


def _unanswered(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, port: int
) -> tuple[int, str, Path]:
    plan = _plan(tmp_path, '"1 kHz"')
    bench = _tcp_bench(tmp_path, port)
    out = tmp_path / "unanswered.h5"
    code, _, err = _cli(capsys, "run", str(plan), "--bench", str(bench), "--out", str(out))
    return code, err, out


def test_nobody_listening_fails_fast_naming_the_instrument(
    tmp_path: Path, opened: Keeper, capsys: pytest.CaptureFixture[str]
) -> None:
    port = _free_port()
    code, err, out = _unanswered(capsys, tmp_path, port)
    assert code == 1
    assert "generator" in err and f"TCPIP::127.0.0.1::{port}::SOCKET" in err
    assert "refused" in err
    if out.exists():
        read_meta(out)  # readable


def test_a_server_that_never_replies_fails_within_its_timeouts(
    tmp_path: Path, opened: Keeper, capsys: pytest.CaptureFixture[str]
) -> None:
    """1 s timeouts and a bounded number of tries of *IDN? (counted at the server, not
    timed): the run gives up, naming instrument and command."""
    heard = bytearray()
    with _silent_server(heard) as port:
        code, err, out = _unanswered(capsys, tmp_path, port)
    assert code == 1, code
    assert 1 <= heard.count(b"*IDN?") <= 3, bytes(heard)
    assert "generator" in err and f"TCPIP::127.0.0.1::{port}::SOCKET" in err
    assert "*IDN?" in err
    if out.exists():
        read_meta(out)  # readable


def test_unanswered_bench_over_a_subprocess_exits_1_without_traceback(tmp_path: Path) -> None:
    plan = _plan(tmp_path, '"1 kHz"')
    bench = _tcp_bench(tmp_path, _free_port())
    done = subprocess.run(
        [sys.executable, "-m", "benchseq", "run", str(plan), "--bench", str(bench),
         "--out", str(tmp_path / "r.h5")],
        capture_output=True, text=True, timeout=60, cwd=tmp_path,
        env={**os.environ, "COLUMNS": "400"},
    )  # fmt: skip
    assert done.returncode == 1, done.stderr
    assert "Traceback" not in done.stdout + done.stderr
    assert "generator" in done.stderr and "cannot open" in done.stderr


# -- a result file that is not one ----------------------------------------------------------------
@pytest.mark.parametrize("kind", ["text", "empty", "truncated", "missing", "bad_journal"])
def test_resume_of_a_file_that_is_not_a_result_names_it(
    tmp_path: Path, opened: Keeper, capsys: pytest.CaptureFixture[str], kind: str
) -> None:
    target = tmp_path / "r.h5"
    if kind == "text":
        target.write_text("title = 'a plan, not a result'\n", encoding="utf-8")
    elif kind == "empty":
        target.write_bytes(b"")
    elif kind == "truncated":  # a complete result cut in half (a copy stopped midway)
        outcome, _ = start_run(str(_plan(tmp_path, '"1 kHz"')), None, str(target), seed=1)
        assert outcome.status == "complete"
        data = target.read_bytes()
        target.write_bytes(data[: len(data) // 2])
        journal_path(target).unlink()  # copied without its journal (with it: repaired)
    elif kind == "bad_journal":  # no result file, and its journal is not a journal
        journal_path(target).write_bytes(b"\x00" * 64)
    before = _digest(target) if target.exists() else None
    sessions = len(opened.sessions)
    code, _, err = _cli(capsys, "run", "--resume", str(target))
    assert code == 2, err
    assert str(target) in err
    assert len(opened.sessions) == sessions  # no bench opened for it
    assert (_digest(target) if target.exists() else None) == before


def test_the_result_file_of_an_unanswered_bench_says_aborted(
    tmp_path: Path, opened: Keeper, capsys: pytest.CaptureFixture[str]
) -> None:
    """The result file is created before the bench is opened; when the bench then does not
    answer, that file must not be left saying "running": it says aborted, and why."""
    port = _free_port()
    code, _, out = _unanswered(capsys, tmp_path, port)
    assert code == 1 and out.exists()
    meta = read_meta(out)
    assert meta["status"] == "aborted", meta["status"]
    assert f"TCPIP::127.0.0.1::{port}::SOCKET" in meta.get("reason", "")


def test_a_full_disk_still_reports_the_safe_state(
    tmp_path: Path,
    opened: Keeper,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """When even the run's ending cannot be recorded (the disk is full), the engineer is
    still told what state the bench was left in (the run summary's "safe state:" line)."""
    plan = _plan(tmp_path, '"1 kHz", "3 kHz", "10 kHz"')
    real_append = jr.JournalWriter.append
    points = {"n": 0}

    def append(self: Any, body: dict[str, Any], blob: bytes = b"") -> tuple[int, int]:
        if points["n"] >= 1:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        done = real_append(self, body, blob)
        points["n"] += body.get("kind") == "point"
        return done

    monkeypatch.setattr(jr.JournalWriter, "append", append)
    code, out, err = _cli(capsys, "run", str(plan), "--out", str(tmp_path / "full.h5"))
    monkeypatch.setattr(jr.JournalWriter, "append", real_append)
    assert code == 1
    assert _safe_order(opened.sessions[0]) == [("generator", False), ("supply", False)]
    assert "safe state: generator: output off, verified" in out + err
