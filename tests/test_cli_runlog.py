"""A run's progress as log lines and its run log file, -q/-v, the library's silence, and
the after-run command, all through `benchseq` itself on the embedded simulated bench.

Without a terminal (output redirected, as here), `run` prints one line per stored point and
one per change of operating point, each starting with the clock time; the same lines go to
RESULT.log beside RESULT.h5, appended to on --resume after a line marking it. The count of
point lines is checked against the points the result file holds. The after-run command is
started on every ending with the BENCHSEQ_* variables, as a plain argument list (no shell),
and neither its failure nor its time limit changes the run's exit code or file."""

from __future__ import annotations

import json
import logging
import os
import re
import shlex
import signal
import socket
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

from benchseq.bench import load_bench
from benchseq.cli import main
from benchseq.sim.server import tcp_bench_text
from benchseq.store import read_meta, read_results

RUN_LIMIT_S = 180.0
STAMP = r"\d{4}-\d\d-\d\d \d\d:\d\d:\d\d "
POINT_LINE = re.compile(STAMP + r"point (\d+)/(\d+) \(#(\d+)\) (.*)$")
OPERATING_LINE = re.compile(STAMP + r"operating point (.*)$")
HEAD = """
title = "FV-33 look"
[device]
name = "FV-33 regulator evaluation board (simulated)"
absolute_max = "6 V"
min_operating = "3.8 V"
[capture]
max_time = "1 s"
target_uncertainty = "0.3 dB"
[mask]
name = "plain limit"
points = [["1 kHz", "40 dB"], ["10 kHz", "20 dB"]]
[sweep]
ripple = ["100 mVpp"]
"""
TWO_BY_TWO = HEAD + 'dc = ["4.5 V", "5 V"]\nfrequency = { at = ["1 kHz", "10 kHz"] }\n'
ONE = HEAD + 'dc = ["5 V"]\nfrequency = { at = ["1 kHz"] }\n'
# the after-run command used here: writes its arguments and BENCHSEQ_* variables to a file
DUMP = (
    "import json, os, sys; json.dump({'argv': sys.argv[2:], 'env': {k: v for k, v in "
    "os.environ.items() if k.startswith('BENCHSEQ_')}}, open(sys.argv[1], 'w'))"
)


def _points(path: Path) -> list[re.Match[str]]:
    return [
        m for line in path.read_text(encoding="utf-8").splitlines() if (m := POINT_LINE.match(line))
    ]


def _lines(text: str, pattern: re.Pattern[str]) -> list[re.Match[str]]:
    return [m for line in text.splitlines() if (m := pattern.match(line))]


@pytest.fixture
def plans(tmp_path: Path) -> Iterator[dict[str, Path]]:
    made = {}
    for name, text in (("two", TWO_BY_TWO), ("one", ONE)):
        made[name] = tmp_path / f"{name}.toml"
        made[name].write_text(text, encoding="utf-8")
    yield made


def _bench_with(tmp_path: Path, table: str, text: str | None = None) -> Path:
    bench = tmp_path / "bench.toml"
    bench.write_text((text or load_bench(None).text) + "\n" + table, encoding="utf-8")
    return bench


def _dump_command(target: Path, *extra: str) -> list[str]:
    return [sys.executable, "-c", DUMP, str(target), *extra]


def _toml_list(items: list[str]) -> str:
    return "[" + ", ".join(json.dumps(i) for i in items) + "]"


# -- progress lines and the run log ----------------------------------------------------------
def test_redirected_run_prints_a_line_per_point_and_writes_the_run_log(
    plans: dict[str, Path], tmp_path: Path
) -> None:
    out = tmp_path / "sweep.h5"
    done = subprocess.run(
        [sys.executable, "-m", "benchseq", "run", str(plans["two"]), "--out", str(out)],
        capture_output=True, text=True, cwd=tmp_path, timeout=RUN_LIMIT_S,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    frame = read_results(out).sort_values("point_id")
    points = _lines(done.stderr, POINT_LINE)
    assert len(points) == len(frame) == 4
    assert [int(m.group(1)) for m in points] == [1, 2, 3, 4]
    assert {int(m.group(2)) for m in points} == {4}
    for match in points:  # the value the file holds, with U, in each line
        row = frame[frame["point_id"] == int(match.group(3))].iloc[0]
        assert f"{row['rejection_db']:.2f} dB ± " in match.group(4)
        # every ± says its coverage (JCGM 100 §6.2: U = k·u is stated with its k)
        spread = f"{2 * row['uncertainty_db']:.2f} dB (k = 2)"
        assert f"dB ± {spread}" in match.group(4) or row["is_bound"]
        assert f"DC {row['dc_level']:g} V" in match.group(4)
        assert ("1 kHz" if row["frequency_planned"] == 1e3 else "10 kHz") in match.group(4)
    operating = _lines(done.stderr, OPERATING_LINE)
    assert [m.group(1) for m in operating] == ["DC 4.5 V", "DC 5 V"]  # one line per change
    assert "point 1/" not in done.stdout and "run complete" in done.stdout  # the summary
    log = out.with_suffix(".log")
    assert len(_points(log)) == len(frame)
    assert _lines(log.read_text(encoding="utf-8"), OPERATING_LINE) != []
    assert "run complete: all points stored" in log.read_text(encoding="utf-8")


def test_resume_appends_to_the_run_log_after_a_marking_line(
    plans: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The first session is stopped by SIGINT sent when its first point line is logged (the
    stop handler takes it before the next point); --resume measures the rest. The after-run
    command of the stopped session is told so."""
    out = tmp_path / "halves.h5"
    told = tmp_path / "stopped.json"

    class StopAtFirstPoint(logging.Handler):
        def emit(self, record: logging.LogRecord) -> None:
            if record.getMessage().startswith("point 1/"):
                os.kill(os.getpid(), signal.SIGINT)

    stopper = StopAtFirstPoint()
    logging.getLogger("benchseq.run").addHandler(stopper)
    try:
        code = main(["run", str(plans["two"]), "--out", str(out),
                     "--after-run", shlex.join(_dump_command(told))])  # fmt: skip
    finally:
        logging.getLogger("benchseq.run").removeHandler(stopper)
    assert code == 1 and read_meta(out)["status"] == "stopped"
    first = len(read_results(out))
    assert 1 <= first < 4
    ending = json.loads(told.read_text(encoding="utf-8"))["env"]
    assert ending["BENCHSEQ_STATUS"] == "stopped" and ending["BENCHSEQ_EXIT_CODE"] == "1"
    assert Path(ending["BENCHSEQ_RESULT"]) == out and ending["BENCHSEQ_RUN_LOG"].endswith(".log")
    log = out.with_suffix(".log")
    assert len(_points(log)) == first
    capsys.readouterr()

    assert main(["run", "--resume", str(out)]) == 0
    text = log.read_text(encoding="utf-8")
    before, marker, after = text.partition("---- run resumed")
    assert marker and "---- run resumed" not in after  # one marking line, between the two
    assert len(_points(log)) == len(read_results(out)) == 4
    assert len([m for m in _lines(before, POINT_LINE)]) == first


def test_on_a_terminal_the_live_display_shows_the_points_and_the_lines_go_to_the_log(
    plans: dict[str, Path],
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setattr("benchseq.cli._is_terminal", lambda console: True)
    out = tmp_path / "live.h5"
    assert main(["run", str(plans["one"]), "--out", str(out)]) == 0
    printed, said = capsys.readouterr()
    assert "latest points" in printed  # the live display's table
    assert _lines(said, POINT_LINE) == [] and _lines(printed, POINT_LINE) == []
    assert len(_points(out.with_suffix(".log"))) == len(read_results(out)) == 1


# -- -q and -v -----------------------------------------------------------------------------
def test_quiet_keeps_to_the_verdict_and_verbose_adds_instrument_detail(
    plans: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "quiet.h5"
    assert main(["-q", "run", str(plans["one"]), "--out", str(out)]) == 0
    printed, said = capsys.readouterr()
    assert _lines(said, POINT_LINE) == [] and said.strip() == ""
    assert printed.splitlines()[0].startswith("run complete") and "mask: PASS" in printed
    assert "results:" not in printed
    assert len(_points(out.with_suffix(".log"))) == 1  # the run log is complete all the same

    out = tmp_path / "verbose.h5"
    assert main(["run", str(plans["one"]), "--out", str(out), "-v"]) == 0
    _, said = capsys.readouterr()
    assert len(_lines(said, POINT_LINE)) == 1
    assert "reads back" in said  # each setting and what the instrument answered
    assert "point 0: capture at" in said  # the capture decision

    with pytest.raises(SystemExit) as refused:  # not both: a usage error, as argparse's own
        main(["-q", "run", str(plans["one"]), "-v"])
    assert refused.value.code == 2 and "exclude each other" in capsys.readouterr().err


def test_the_library_attaches_no_handler_and_prints_nothing(
    plans: dict[str, Path], tmp_path: Path
) -> None:
    script = (
        "import logging, benchseq\n"
        f"r = benchseq.run({str(plans['one'])!r}, out={str(tmp_path / 'lib.h5')!r})\n"
        "assert r.status == 'complete', r\n"
        "assert logging.getLogger().handlers == []\n"
        "assert [type(h).__name__ for h in logging.getLogger('benchseq').handlers]"
        " == ['NullHandler']\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, timeout=RUN_LIMIT_S
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout == "" and done.stderr == ""
    assert not (tmp_path / "lib.log").exists()  # the run log is the command line's


# -- the after-run command -------------------------------------------------------------------
def test_after_run_command_of_the_bench_gets_the_ending_as_plain_arguments(
    plans: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    told = tmp_path / "told.json"
    words = ["two words", "$HOME;echo no-shell", "*"]
    command = _toml_list(_dump_command(told, *words))
    bench = _bench_with(tmp_path, f'[after_run]\ncommand = {command}\ntimeout = "30 s"\n')
    out = tmp_path / "done.h5"
    assert main(["run", str(plans["one"]), "--bench", str(bench), "--out", str(out)]) == 0
    capsys.readouterr()
    seen = json.loads(told.read_text(encoding="utf-8"))
    assert seen["argv"] == words  # as written: no shell expanded or split anything
    env = seen["env"]
    assert env["BENCHSEQ_STATUS"] == "complete" and env["BENCHSEQ_EXIT_CODE"] == "0"
    assert env["BENCHSEQ_VERDICT"] == "pass" and env["BENCHSEQ_NOT_SAFE"] == ""
    assert Path(env["BENCHSEQ_RESULT"]) == out
    assert "the after-run command" in out.with_suffix(".log").read_text(encoding="utf-8")


def test_a_failing_or_hanging_after_run_command_changes_nothing(
    plans: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "fails.h5"
    failing = f'"{sys.executable}" -c "print(\'lamp unreachable\'); raise SystemExit(3)"'
    code = main(["-q", "run", str(plans["one"]), "--out", str(out), "--after-run", failing])
    _, said = capsys.readouterr()
    assert code == 0 and read_meta(out)["status"] == "complete"
    assert "exited with code 3" in said  # a warning: shown even with -q
    log = out.with_suffix(".log").read_text(encoding="utf-8")
    assert "after-run: lamp unreachable" in log and "exited with code 3" in log

    # a command that outlives its limit is ended (its process group with it)
    hang = _toml_list(
        [sys.executable, "-c", "import time; print('paging', flush=True); time.sleep(120)"]
    )
    bench = _bench_with(tmp_path, f'[after_run]\ncommand = {hang}\ntimeout = "1 s"\n')
    out = tmp_path / "hangs.h5"
    code = main(["run", str(plans["one"]), "--bench", str(bench), "--out", str(out)])
    _, said = capsys.readouterr()
    assert code == 0 and read_meta(out)["status"] == "complete"
    assert "did not finish within 1 s and was ended" in said
    assert "after-run: paging" in out.with_suffix(".log").read_text(encoding="utf-8")


def test_after_run_command_on_a_failed_and_on_a_refused_run(
    plans: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A bench whose instruments cannot be reached (a port nobody listens on, 127.0.0.1):
    the run fails (exit 1) after its file was made; then a plan that does not exist (exit
    2, nothing switched on). The command is started both times."""
    with socket.socket() as probe:  # a free port, closed again: connections are refused
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    addresses = {r: f"TCPIP::127.0.0.1::{port}::SOCKET" for r in ("generator", "supply", "scope")}
    text = tcp_bench_text(load_bench("sim:demo").text, addresses, "demo")
    text = text.replace("[lab]\n", '[lab]\noutage_patience = "1 s"\n', 1)
    told = tmp_path / "failed.json"
    bench = _bench_with(
        tmp_path, f"[after_run]\ncommand = {_toml_list(_dump_command(told))}\n", text
    )
    out = tmp_path / "unreachable.h5"
    assert main(["run", str(plans["one"]), "--bench", str(bench), "--out", str(out)]) == 1
    assert "cannot open" in capsys.readouterr().err
    env = json.loads(told.read_text(encoding="utf-8"))["env"]
    assert env["BENCHSEQ_STATUS"] == "failed" and env["BENCHSEQ_EXIT_CODE"] == "1"
    assert "cannot open" in env["BENCHSEQ_REASON"] and Path(env["BENCHSEQ_RESULT"]) == out
    assert read_meta(out)["status"] == "aborted"
    assert "run failed" in out.with_suffix(".log").read_text(encoding="utf-8")

    told.unlink()
    missing = tmp_path / "no-such-plan.toml"
    assert main(["run", str(missing), "--bench", str(bench)]) == 2
    capsys.readouterr()
    env = json.loads(told.read_text(encoding="utf-8"))["env"]
    assert env["BENCHSEQ_STATUS"] == "refused" and env["BENCHSEQ_EXIT_CODE"] == "2"
    assert env["BENCHSEQ_RESULT"] == ""


@pytest.mark.parametrize(
    ("table", "where"),
    [
        ('[after_run]\ncomand = ["true"]\n', "after_run.comand"),
        ('[after_run]\ncommand = "notify me"\n', "after_run.command"),
        ('[after_run]\ncommand = ["true"]\ntimeout = "1 h"\n', "after_run.timeout"),
    ],
)
def test_a_bad_after_run_table_is_refused_by_key(
    table: str, where: str, plans: dict[str, Path], tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:  # fmt: skip
    bench = _bench_with(tmp_path, table)
    assert main(["check", str(plans["one"]), "--bench", str(bench)]) == 2
    said = " ".join(capsys.readouterr().err.split())
    assert str(bench) in said and where in said
