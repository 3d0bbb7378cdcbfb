"""The integrity of a result file, through the `benchseq` command line: one writer per file,
an HDF5 file repaired from its journal after a kill or a full disk, checksummed rows,
damaged journals reported, files that are not regular files refused, and runs that ended
early saying so (interrupted, stopped, incomplete verdict, sessions).

Processes are synchronised by polling files with a deadline (the lock file's holder, the
journal's records), never by sleeping for a guessed time; kills at a chosen moment of an
HDF5 update come from the store's fault hook (``BENCHSEQ_STORE_FAULT``)."""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import struct
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from benchseq import journal as jr
from benchseq.cli import main
from benchseq.store import FAULT_ENV, journal_path, read_meta, read_results, stale_temporaries
from benchseq.writelock import lock_path, read_holder

ROOT = Path(__file__).resolve().parent.parent
PLANS = ROOT / "plans"
DEMO_FREQUENCIES = 'frequency = { from = "10 Hz", to = "1 MHz", per_decade = 3 }'
DEADLINE_S = 240.0


@pytest.fixture(autouse=True)
def _wide_console(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("COLUMNS", "400")  # messages on one line, paths never wrapped


def _plan(folder: Path, frequencies: str, name: str = "plan.toml") -> Path:
    text = (PLANS / "demo.toml").read_text(encoding="utf-8")
    assert DEMO_FREQUENCIES in text
    path = folder / name
    path.write_text(text.replace(DEMO_FREQUENCIES, frequencies), encoding="utf-8")
    return path


def _env(**extra: str) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k != FAULT_ENV}
    env["COLUMNS"] = "400"
    env.update(extra)
    return env


def _benchseq(*argv: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "benchseq", *argv],
        capture_output=True,
        text=True,
        env=env or _env(),
        timeout=DEADLINE_S,
        cwd=ROOT,
    )


def _start(log: Path, *argv: str, env: dict[str, str] | None = None) -> subprocess.Popen:
    """Start `benchseq ARGV` with its output (stdout and stderr) going to ``log``."""
    with open(log, "w", encoding="utf-8") as handle:
        return subprocess.Popen(
            [sys.executable, "-m", "benchseq", *argv],
            stdout=handle,
            stderr=subprocess.STDOUT,
            env=env or _env(),
            cwd=ROOT,
        )


def _journal_points(out: Path) -> int:
    if not journal_path(out).is_file():
        return 0
    return sum(1 for r in jr.scan(journal_path(out)).records if r.body.get("kind") == "point")


def _wait_until(condition, proc: subprocess.Popen, what: str) -> None:
    deadline = time.monotonic() + DEADLINE_S
    while time.monotonic() < deadline:
        if condition():
            return
        if proc.poll() is not None:
            pytest.fail(f"the run ended before {what} (exit {proc.returncode})")
        time.sleep(0.02)  # polling interval, not a synchronisation by time
    pytest.fail(f"timed out waiting for {what}")


def _cli(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    return code, out, err


def _h5_status_and_rows(path: Path) -> tuple[str, int]:
    with h5py.File(path, "r", locking=False) as h5:
        return str(h5.attrs["status"]), int(h5["points/point_id"].shape[0])


# -- one writer per file -----------------------------------------------------------------
@pytest.mark.slow
def test_a_second_writer_is_refused_naming_the_holder(tmp_path: Path) -> None:
    """While a run writes X, `run --resume X` and `run --force --out X` are refused (exit 2)
    naming the holder; the first run's points all stay, each once."""
    plan = _plan(tmp_path, 'frequency = { from = "10 Hz", to = "1 MHz", per_decade = 10 }')
    out = tmp_path / "busy.h5"
    first = _start(tmp_path / "first.log", "run", str(plan), "--out", str(out))
    try:
        _wait_until(
            lambda: (h := read_holder(out)) is not None and h.pid == first.pid,
            first,
            "the lock holder is written",
        )
        _wait_until(lambda: _journal_points(out) >= 1, first, "a point is stored")
        for argv in (
            ("run", "--resume", str(out)),
            ("run", str(plan), "--force", "--out", str(out)),
        ):
            refused = _benchseq(*argv)
            text = refused.stdout + refused.stderr
            assert refused.returncode == 2, text
            assert f"process {first.pid}" in text and "being written by" in text, text
            assert "Traceback" not in text
        assert first.poll() is None, "the first run was disturbed"
        os.kill(first.pid, signal.SIGTERM)  # stop it early; its points must all be there
        first.wait(timeout=DEADLINE_S)
    finally:
        if first.poll() is None:
            first.kill()
            first.wait()
    assert first.returncode == 1  # stopped before it finished
    frame = read_results(out)
    assert len(frame) >= 1 and not frame["point_id"].duplicated().any()
    assert sorted(frame["point_id"]) == list(range(len(frame)))
    assert read_meta(out)["status"] == "stopped"
    assert not lock_path(out).exists()  # released when the run ended


# -- the HDF5 file repaired from the journal -----------------------------------------------
@pytest.fixture(scope="module")
def killed_in_final_update(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A run SIGKILLed during the HDF5 update that follows "complete" in the journal."""
    folder = tmp_path_factory.mktemp("final")
    plan = _plan(folder, 'frequency = ["1 kHz", "10 kHz", "100 kHz"]')
    out = folder / "killed.h5"
    done = _benchseq(
        "run", str(plan), "--out", str(out), env=_env(**{FAULT_ENV: "kill:final-written"})
    )
    assert done.returncode == -signal.SIGKILL, done.stderr
    return out


def _copy_result(source: Path, folder: Path) -> Path:
    target = folder / source.name
    for name in os.listdir(source.parent):
        if name.startswith((source.name, f".{source.name}")):
            shutil.copy2(source.parent / name, folder / name)
    return target


def test_resume_repairs_the_hdf5_file_after_a_kill_in_the_final_update(
    killed_in_final_update: Path, tmp_path: Path
) -> None:
    out = _copy_result(killed_in_final_update, tmp_path)
    # what a plain h5py reader saw: still "running", and a full temporary copy beside it
    assert _h5_status_and_rows(out)[0] == "running"
    assert stale_temporaries(out)
    assert read_meta(out)["status"] == "complete"  # the journal says so
    done = _benchseq("run", "--resume", str(out))
    assert done.returncode == 0, done.stderr
    assert "repaired from the journal" in done.stderr and "already complete" in done.stdout
    assert _h5_status_and_rows(out) == ("complete", 3)
    assert stale_temporaries(out) == []
    again = _benchseq("run", "--resume", str(out))  # now nothing is left to do or say
    assert again.returncode == 0 and "repaired" not in again.stderr


def test_show_and_report_repair_too_or_say_the_file_is_stale(
    killed_in_final_update: Path, tmp_path: Path
) -> None:
    (tmp_path / "s").mkdir()
    shown = _copy_result(killed_in_final_update, tmp_path / "s")
    done = _benchseq("show", str(shown))
    assert done.returncode == 0 and "repaired from the journal" in done.stderr
    assert "status complete" in done.stdout and "temporary" in done.stderr
    assert _h5_status_and_rows(shown) == ("complete", 3)

    (tmp_path / "r").mkdir()
    reported = _copy_result(killed_in_final_update, tmp_path / "r")
    done = _benchseq("report", str(reported), "-o", str(tmp_path / "r" / "k.md"))
    assert done.returncode == 0 and "repaired from the journal" in done.stderr
    assert _h5_status_and_rows(reported) == ("complete", 3)

    if os.geteuid() == 0:
        return  # root writes into read-only folders; the stale-file notice cannot be shown
    (tmp_path / "ro").mkdir()
    frozen = _copy_result(killed_in_final_update, tmp_path / "ro")
    (tmp_path / "ro").chmod(0o555)
    try:
        done = _benchseq("show", str(frozen))
    finally:
        (tmp_path / "ro").chmod(0o755)
    assert done.returncode == 0 and "is stale" in done.stderr and "status complete" in done.stdout


def test_a_disk_full_at_the_end_is_completed_by_resume_once_space_is_freed(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    plan = _plan(tmp_path, 'frequency = ["1 kHz", "10 kHz"]')
    out = tmp_path / "full.h5"
    monkeypatch.setenv(FAULT_ENV, "enospc:update,final")  # every update after creation
    code, _, _ = _cli(capsys, "run", str(plan), "--out", str(out))
    assert code == 1  # the result file could not be completed
    assert _h5_status_and_rows(out) == ("running", 0)
    assert len(read_results(out)) == 2  # every point safe in the journal
    monkeypatch.delenv(FAULT_ENV)  # space freed
    code, printed, err = _cli(capsys, "run", "--resume", str(out))
    assert code == 0 and "repaired from the journal" in err and "already complete" in printed
    assert _h5_status_and_rows(out) == ("complete", 2)
    assert stale_temporaries(out) == []


# -- checksums, damaged journals, odd files ---------------------------------------------
@pytest.fixture(scope="module")
def complete_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("crc")
    plan = _plan(folder, 'frequency = ["1 kHz", "10 kHz", "100 kHz"]')
    out = folder / "done.h5"
    assert main(["run", str(plan), "--out", str(out)]) == 0
    return out


def _flip_exponent_bit(path: Path, point: int) -> tuple[float, float]:
    """Flip the lowest exponent bit of /points/rejection_db[point] (doubles the value)."""
    with h5py.File(path, "r+", locking=False) as h5:
        ds = h5["points/rejection_db"]
        before = float(ds[point])
        bits = struct.unpack("<Q", struct.pack("<d", before))[0] ^ (1 << 52)
        ds[point] = struct.unpack("<d", struct.pack("<Q", bits))[0]
        return before, float(ds[point])


def test_a_flipped_bit_is_caught_and_the_journal_value_shown(
    complete_run: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = _copy_result(complete_run, tmp_path)
    assert journal_path(out).exists()  # kept after completion: the second record
    before, after = _flip_exponent_bit(out, 1)
    assert abs(after) == pytest.approx(2 * abs(before))
    code, printed, err = _cli(capsys, "show", str(out), "--json")
    assert code == 0 and "point(s) 1 fail their checksum" in err and "journal's copy" in err
    shown = {p["point_id"]: p["rejection_db"] for p in json.loads(printed)["points"]}
    assert shown[1] == before
    journal_path(out).unlink()  # no second record left: the damage is an error
    code, _, err = _cli(capsys, "show", str(out))
    assert code == 2 and "point(s) 1 fail their checksum" in err


def test_unreadable_hdf5_storage_is_an_error_naming_the_table(
    complete_run: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """Storage h5py cannot read (a damaged chunk raises OSError inside h5py) ends `show` with
    exit 2 and a message naming the file and table, never a traceback."""
    from benchseq import results

    out = _copy_result(complete_run, tmp_path)

    def unreadable(*args, **kwargs):
        raise OSError("Can't synchronously read data (damaged chunk)")

    monkeypatch.setattr(results, "_column_arrays", unreadable)
    code, _, err = _cli(capsys, "show", str(out))
    assert code == 2 and "/points cannot be read" in err and "damaged" in err
    assert "Traceback" not in err


def _damage_units(h5: h5py.File) -> None:
    # bytes that are not UTF-8 in a UTF-8 string attribute: one bit of "p" in "V (peak)"
    units = h5["points/pin"].attrs["units"]
    raw = units.encode("utf-8").replace(b"(p", b"(\x8f")
    h5["points/pin"].attrs.create("units", raw, dtype=h5py.string_dtype("utf-8"))


def _damage_shape(h5: h5py.File) -> None:
    # a column that claims far more rows than the file could hold (a damaged dataspace)
    h5["points/pin_sigma"].resize((10**9,))


def _damage_kind(h5: h5py.File) -> None:
    # a column name that leads to a stored datatype instead of a dataset
    del h5["points/pin_sigma"]
    h5["points/pin_sigma"] = np.dtype("f8")


def _damage_dtype(h5: h5py.File) -> None:
    # a complex column whose datatype reads as three-field records (a damaged datatype)
    old = h5["points/pin"]
    rows, attrs = old.shape[0], {k: v for k, v in old.attrs.items() if k in ("kind", "units", "description")}
    del h5["points/pin"]
    new = h5["points"].create_dataset("pin", (rows,), dtype=[("a", "f8"), ("b", "f8"), ("c", "f8")])
    new.attrs.update(attrs)


@pytest.mark.parametrize("damage", [_damage_units, _damage_shape, _damage_kind, _damage_dtype])
def test_a_damaged_column_is_an_error_naming_the_file(
    damage, complete_run: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Damage the command-line fuzzing of result files met (tests/perf/fuzz_inputs.py:
    a flipped bit in an attribute's text, a dataspace, an object's type) ends `show` and
    `report` with exit 2 and a message naming the file, never a traceback, a 30 GiB
    allocation or a label with undecodable text in it."""
    out = _copy_result(complete_run, tmp_path)
    with h5py.File(out, "r+", locking=False) as h5:
        damage(h5)
    code, _, err = _cli(capsys, "show", str(out))
    assert code == 2 and "done.h5" in err and "damaged" in err
    code, _, err = _cli(capsys, "report", str(out), "--format", "csv", "-o", str(tmp_path / "r.csv"))
    assert code == 2 and "done.h5" in err
    assert not (tmp_path / "r.csv").exists()


def test_a_file_that_crashes_the_hdf5_library_is_refused_and_rebuilt_from_its_journal(
    complete_run: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """libhdf5 ends the process with SIGSEGV on some damaged object headers (single-byte
    damage of a result file met it a few times in a thousand): `show` first reads the file
    in a forked child, here one that dies by SIGSEGV as that library does, and refuses the
    file (exit 2) naming its journal and what to do; done as it says, the file comes back."""
    from benchseq import results

    out = _copy_result(complete_run, tmp_path)

    def crash(path: Path) -> None:
        os.kill(os.getpid(), signal.SIGSEGV)

    monkeypatch.setattr(results, "_read_everything", crash)
    code, _, err = _cli(capsys, "show", str(out))
    assert code == 2 and "crashed reading it (signal 11)" in err and "done.h5.journal" in err
    code, _, err = _cli(capsys, "report", str(out), "--format", "csv", "-o", str(tmp_path / "r.csv"))
    assert code == 2 and "crashed" in err
    monkeypatch.undo()
    out.rename(tmp_path / "done.h5.damaged")  # what the message says to do
    code, printed, err = _cli(capsys, "show", str(out), "--json")
    assert code == 0 and "repaired from the journal" in err
    assert len(json.loads(printed)["points"]) == 3


def test_a_file_whose_reading_never_ends_is_refused(
    complete_run: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """Some single-byte damage makes libhdf5 read without end (met at one byte of a demo
    result). The child that reads first is ended at its limit (here 0.2 s instead of
    120 s; the child blocks until a signal that never comes) and the file refused."""
    from benchseq import results

    out = _copy_result(complete_run, tmp_path)
    monkeypatch.setattr(results, "_read_everything", lambda path: signal.pause())
    monkeypatch.setattr(results, "PROBE_LIMIT_S", 0.2)
    code, _, err = _cli(capsys, "show", str(out))
    assert code == 2 and "did not end" in err and "done.h5.journal" in err


def test_a_damaged_journal_is_reported_not_skipped(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    plan = _plan(tmp_path, 'frequency = ["1 kHz", "10 kHz", "100 kHz"]')
    out = tmp_path / "lag.h5"
    monkeypatch.setenv(FAULT_ENV, "enospc:update,final")  # the journal alone holds the points
    assert main(["run", str(plan), "--out", str(out)]) == 1
    monkeypatch.delenv(FAULT_ENV)
    capsys.readouterr()
    pristine = journal_path(out).read_bytes()
    records = jr.scan(journal_path(out)).records
    point = next(r for r in records if r.body.get("kind") == "point" and r.body["id"] == 1)
    damaged = bytearray(pristine)
    damaged[(point.start + point.end) // 2] ^= 0x10
    journal_path(out).write_bytes(bytes(damaged))
    code, printed, err = _cli(capsys, "show", str(out), "--json")
    assert code == 0 and "1 journal record(s) unreadable" in err
    assert sorted(p["point_id"] for p in json.loads(printed)["points"]) == [0, 2]

    header = records[0]
    damaged = bytearray(pristine)
    damaged[(header.start + header.end) // 2] ^= 0x10
    journal_path(out).write_bytes(bytes(damaged))
    code, printed, err = _cli(capsys, "show", str(out), "--json")
    assert code == 0 and "header record is damaged" in err and "3 point record(s)" in err


@pytest.mark.parametrize(
    "argv",
    [("show", "{x}"), ("report", "{x}"), ("replay", "{x}"), ("run", "--resume", "{x}")],
)
def test_a_fifo_named_like_a_result_is_refused_at_once(tmp_path: Path, argv: tuple) -> None:
    fifo = tmp_path / "x.h5"
    os.mkfifo(fifo)
    done = _benchseq(*(a.format(x=fifo) for a in argv))
    assert done.returncode == 2 and "FIFO" in done.stderr and "Traceback" not in done.stderr


def test_replay_and_report_never_overwrite_their_input(
    complete_run: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = _copy_result(complete_run, tmp_path)
    before = out.read_bytes()
    for argv in (
        ("replay", str(out), "--out", str(out), "--force"),
        ("replay", str(out), "--reanalyse", "--out", str(tmp_path / "." / out.name), "--force"),
        ("report", str(out), "-o", str(out), "--format", "md"),
    ):
        code, _, err = _cli(capsys, *argv)
        assert code == 2 and "is the input" in err
    assert out.read_bytes() == before


# -- how a run that ended early reads ---------------------------------------------------
@pytest.mark.slow
def test_a_killed_run_reads_as_interrupted_and_its_sessions_are_recorded(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "cut.h5"
    run = _start(tmp_path / "run.log", "run", str(PLANS / "demo.toml"), "--out", str(out))
    try:
        _wait_until(lambda: _journal_points(out) >= 2, run, "two points are stored")
        os.kill(run.pid, signal.SIGKILL)
        run.wait(timeout=DEADLINE_S)
    finally:
        if run.poll() is None:
            run.kill()
            run.wait()
    stored = len(read_results(out))
    code, printed, _ = _cli(capsys, "show", str(out))
    assert code == 0 and "status interrupted" in printed and "last point stored 20" in printed
    # the mask verdict of a partial run says it covers only what is stored
    assert re.search(rf"so far.*incomplete run: {stored} of 16 planned points stored", printed)
    code, printed, _ = _cli(capsys, "show", str(out), "--json")
    meta = json.loads(printed)["meta"]
    assert meta["status"] == "interrupted" and meta["interrupted"]["points_stored"] == stored
    assert json.loads(printed)["mask"]["complete"] is False

    code, printed, _ = _cli(capsys, "run", "--resume", str(out))
    assert code == 0 and "run complete" in printed
    sessions = read_meta(out)["sessions"]
    assert [s["status"] for s in sessions] == ["interrupted", "complete"]
    assert sessions[0]["points_at_end"] == stored and sessions[1]["points_at_start"] == stored
    assert sessions[1]["points_at_end"] == 16
    assert _cli(capsys, "report", str(out), "-o", str(tmp_path / "r.md"))[0] == 0
    text = (tmp_path / "r.md").read_text(encoding="utf-8")
    assert "session 1" in text and "interrupted" in text and "session 2" in text


def test_a_stopped_run_exits_1_and_its_verdict_says_incomplete(tmp_path: Path) -> None:
    out = tmp_path / "stop.h5"
    log = tmp_path / "run.log"
    run = _start(log, "run", str(PLANS / "demo.toml"), "--out", str(out))
    try:
        _wait_until(lambda: _journal_points(out) >= 1, run, "a point is stored")
        os.kill(run.pid, signal.SIGTERM)
        run.wait(timeout=DEADLINE_S)
    finally:
        if run.poll() is None:
            run.kill()
            run.wait()
    printed = log.read_text(encoding="utf-8")
    assert run.returncode == 1, printed
    assert "run stopped" in printed
    found = re.search(
        r"so far against .*incomplete run: (\d+) of 16 planned points stored", printed
    )
    assert found and int(found.group(1)) == len(read_results(out)) < 16
    assert np.isfinite(read_results(out)["rejection_db"]).all()
