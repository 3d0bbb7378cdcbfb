"""Stopping a run: Ctrl-C (SIGINT), SIGTERM and SIGHUP sent to a real `benchseq run`
process, a second Ctrl-C, and an exception during a point. Every time the instruments end
in the safe state in the common-practice order: generator output
off, then the electronic load's input off, then the supply's output off and its set-point
to the safe level (0 V): the supply never stays energised at a "safe level".

The bench is `benchseq sim serve --scenario amplifier` (it has an electronic load) in its own
process on 127.0.0.1, reached over pyvisa-py TCP; the order comes from the state-change log
the server appends to (`--log`), the final state from asking the instruments over SCPI after
the run. The exception cases run in-process, where the simulator's own log is at hand.
Every process is started with a time limit and ended by its pid in a finally."""

from __future__ import annotations

import json
import os
import random
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from fakebench import Keeper

from benchseq import journal as jr
from benchseq.bench import load_bench
from benchseq.runner import resume_run, start_run
from benchseq.sim.faults import FaultRates
from benchseq.sim.server import read_state_log, tcp_bench_text, wait_for_port
from benchseq.store import journal_path, read_meta, read_results

pytestmark = pytest.mark.skipif(os.name != "posix", reason="POSIX signals")

SCENARIO = "amplifier"
ROLES = ("generator", "supply", "scope", "load")  # the bench file's order: ports base + k
PLAN = """
title = "AB-10 amplifier board: rejection at 5 V with a 20 mA load"
[device]
name = "AB-10 gain-of-10 amplifier board (simulated)"
absolute_max = "5.5 V"
min_operating = "3 V"
[sweep]
dc = ["5 V"]
ripple = ["200 mVpp"]
load = ["20 mA"]
frequency = ["200 Hz", "1 kHz", "10 kHz", "100 kHz"]
[settle]
wait = "1.5 s"                  # each point lasts long enough to be signalled during it
after_operating_point = "0.2 s"
[capture]
max_time = "1 s"
target_uncertainty = "0.2 dB"
"""
POINTS = 4
SAFE = [("generator", False), ("load", False), ("supply", False)]
RUN_LIMIT_S = 120.0


# -- the served bench ----------------------------------------------------------------------------
class Served:
    """A `benchseq sim serve` process: its ports, bench file and state-change log."""

    def __init__(self, folder: Path, proc: subprocess.Popen[bytes], base: int) -> None:
        self.folder = folder
        self.proc = proc
        self.ports = {role: base + k for k, role in enumerate(ROLES)}
        self.log = folder / "states.jsonl"
        addresses = {r: f"TCPIP::127.0.0.1::{p}::SOCKET" for r, p in self.ports.items()}
        self.bench = folder / "served.bench.toml"
        self.bench.write_text(
            tcp_bench_text(load_bench(f"sim:{SCENARIO}").text, addresses, SCENARIO),
            encoding="utf-8",
        )

    def entries(self) -> list[dict[str, Any]]:
        return read_state_log(self.log) if self.log.exists() else []

    def ask(self, role: str, command: str) -> str:
        """One SCPI query on a fresh connection (the server serves several at once)."""
        with socket.create_connection(("127.0.0.1", self.ports[role]), timeout=5.0) as conn:
            conn.sendall(command.encode("ascii") + b"\n")
            reply = b""
            while not reply.endswith(b"\n"):
                chunk = conn.recv(4096)
                if not chunk:
                    break
                reply += chunk
        return reply.decode("ascii").strip()


def _ports_free(base: int) -> bool:
    for port in range(base, base + len(ROLES)):
        probe = socket.socket()
        try:
            probe.bind(("127.0.0.1", port))
        except OSError:
            return False
        finally:
            probe.close()
    return True


def _end(proc: subprocess.Popen[Any], first: int = signal.SIGINT) -> None:
    """End a process we started, by its pid: ``first`` signal, then SIGKILL."""
    if proc.poll() is None:
        os.kill(proc.pid, first)
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait(timeout=10)


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    folder = tmp_path_factory.mktemp("served")
    rng = random.Random()
    for _ in range(5):  # a free base port: four consecutive ports nobody listens on
        base = rng.randrange(20000, 60000)
        if not _ports_free(base):
            continue
        with open(folder / "server.err", "wb") as err:
            proc = subprocess.Popen(
                [sys.executable, "-m", "benchseq", "sim", "serve", "--scenario", SCENARIO,
                 "--port", str(base), "--log", str(folder / "states.jsonl")],
                stdout=subprocess.DEVNULL, stderr=err, cwd=folder,
            )  # fmt: skip
        try:
            for k in range(len(ROLES)):
                wait_for_port("127.0.0.1", base + k, timeout_s=30.0)
        except OSError:
            _end(proc)
            continue
        try:
            yield Served(folder, proc, base)
        finally:
            _end(proc)
        return
    pytest.fail("could not start `benchseq sim serve` on free ports")


# -- running and stopping --------------------------------------------------------------------
def _points_in_journal(out: Path) -> int:
    jpath = journal_path(out)
    if not jpath.exists():
        return 0
    return sum(1 for r in jr.scan(jpath).records if r.body.get("kind") == "point")


def _start(served: Served, out: Path, resume: bool = False) -> tuple[subprocess.Popen[bytes], Path]:
    """`benchseq run` of PLAN on the served bench into ``out`` (or --resume ``out``)."""
    plan = served.folder / "plan.toml"
    plan.write_text(PLAN, encoding="utf-8")
    if resume:
        argv = ["--resume", str(out)]
    else:
        argv = [str(plan), "--bench", str(served.bench), "--out", str(out)]
    text = out.with_name(out.stem + ("-resume" if resume else "") + ".stdout")
    with open(text, "wb") as sink, open(text.with_suffix(".stderr"), "wb") as err:
        proc = subprocess.Popen(
            [sys.executable, "-m", "benchseq", "run", *argv, "--json"],
            stdout=sink, stderr=err, cwd=served.folder,
            env={**os.environ, "COLUMNS": "200"},
        )  # fmt: skip
    return proc, text


def _errors(text: Path) -> str:
    return text.with_suffix(".stderr").read_text(encoding="utf-8")


def _outcome(text: Path) -> dict[str, Any]:
    """The run's outcome: its whole stdout parsed as JSON (the rest went to stderr)."""
    errors = _errors(text)
    assert "Traceback" not in errors, errors
    return json.loads(text.read_text(encoding="utf-8"))


def _wait_for_points(proc: subprocess.Popen[bytes], out: Path, count: int) -> int:
    deadline = time.monotonic() + RUN_LIMIT_S
    while time.monotonic() < deadline:
        seen = _points_in_journal(out)
        if seen >= count:
            return seen
        assert proc.poll() is None, "the run ended before it was signalled"
        time.sleep(0.05)
    pytest.fail(f"no {count} points stored within {RUN_LIMIT_S} s")


def _wait_for_second_point(
    served: Served, proc: subprocess.Popen[bytes], out: Path, since: int
) -> None:
    """Until point 1 (1 kHz) is in progress: point 0 stored and the generator moved to about
    1 kHz (the first thing a point does; the plan's 1.5 s least wait then holds the point),
    not yet to 10 kHz. ``since``: the log entries before this run started."""
    _wait_for_points(proc, out, 1)
    deadline = time.monotonic() + RUN_LIMIT_S
    while time.monotonic() < deadline:
        told = [
            float(entry["value"])
            for entry in served.entries()[since:]
            if entry["role"] == "generator" and entry["what"] == "frequency"
        ]
        if any(abs(f / 1000.0 - 1.0) < 0.01 for f in told):
            assert not any(abs(f / 10000.0 - 1.0) < 0.01 for f in told), told
            assert _points_in_journal(out) == 1
            return
        assert proc.poll() is None, "the run ended before it was signalled"
        time.sleep(0.02)
    pytest.fail("point 1 did not start")


def _pending(pid: int) -> int:
    """The signals waiting for delivery to process ``pid`` (its threads' and its own), as
    the kernel shows them in /proc/<pid>/status (SigPnd, ShdPnd: hexadecimal bit masks)."""
    mask = 0
    for line in Path(f"/proc/{pid}/status").read_text(encoding="ascii").splitlines():
        if line.startswith(("SigPnd:", "ShdPnd:")):
            mask |= int(line.split(":", 1)[1], 16)
    return mask


def _wait_until_delivered(proc: subprocess.Popen[bytes], sig: signal.Signals) -> None:
    """Polls (with a deadline) until ``sig`` is no longer pending for ``proc``: delivered to
    its handler, so a second one is a second request and not merged with the first."""
    bit = 1 << (int(sig) - 1)
    deadline = time.monotonic() + RUN_LIMIT_S
    while time.monotonic() < deadline:
        if proc.poll() is not None or not _pending(proc.pid) & bit:
            return
        time.sleep(0.005)  # polling interval
    pytest.fail(f"{sig.name} not delivered within {RUN_LIMIT_S} s")


def _switches(entries: list[dict[str, Any]]) -> list[tuple[str, bool]]:
    return [(e["role"], bool(e["value"])) for e in entries if e["what"] in ("output", "input")]


def _check_safe(served: Served, after: int) -> None:
    """The state changes since entry ``after``: outputs go off in the safe order and
    nothing goes on after the generator went off; the supply's output goes off before its
    set-point goes to 0 V; and the instruments say so when asked."""
    entries = served.entries()[after:]
    switches = _switches(entries)
    assert switches[-3:] == SAFE, switches
    generator_off = max(i for i, e in enumerate(entries) if e["role"] == "generator"
                        and e["what"] == "output" and not e["value"])  # fmt: skip
    later = entries[generator_off:]
    assert not any(e["value"] is True for e in later if e["what"] in ("output", "input"))
    supply = [(e["what"], e["value"]) for e in later if e["role"] == "supply"]
    assert supply[-2:] == [("output", False), ("voltage", 0.0)], supply
    assert served.ask("generator", "OUTP1?") == "0"
    assert served.ask("load", "INP1?") == "0"
    assert served.ask("supply", "OUTP1?") == "0"
    assert float(served.ask("supply", "SOUR1:VOLT?")) == 0.0


def _resume_completes(served: Served, out: Path, stored: list[int]) -> None:
    before = read_results(out).set_index("point_id").sort_index()
    mark = len(served.entries())
    proc, text = _start(served, out, resume=True)
    try:
        proc.wait(timeout=RUN_LIMIT_S)
    finally:
        _end(proc)
    assert proc.returncode == 0, _errors(text)
    assert _outcome(text)["status"] == "complete"
    final = read_results(out).set_index("point_id").sort_index()
    assert list(final.index) == list(range(POINTS))  # each point once
    assert (final.loc[stored, "rejection_db"] == before.loc[stored, "rejection_db"]).all()
    _check_safe(served, mark)


@pytest.mark.parametrize(
    "sig",
    [
        signal.SIGINT,
        pytest.param(signal.SIGTERM, marks=pytest.mark.slow),
        pytest.param(signal.SIGHUP, marks=pytest.mark.slow),
    ],
)
def test_a_stop_signal_finishes_the_point_then_goes_to_the_safe_state(
    served: Served, tmp_path: Path, sig: signal.Signals
) -> None:
    out = tmp_path / f"stopped-{sig.name}.h5"
    mark = len(served.entries())
    proc, text = _start(served, out)
    try:
        _wait_for_second_point(served, proc, out, mark)
        os.kill(proc.pid, sig)
        proc.wait(timeout=RUN_LIMIT_S)
    finally:
        _end(proc)
    assert proc.returncode == 1, _errors(text)  # stopped early: not 0
    outcome = _outcome(text)
    assert outcome["status"] == "stopped" and outcome["reason"] == f"{sig.name} received"
    meta = read_meta(out)
    assert meta["status"] == "stopped" and sig.name in meta["reason"]
    ids = list(read_results(out)["point_id"])
    assert ids == [0, 1]  # the point in progress (1) was finished and stored, then it stopped
    _check_safe(served, mark)
    if sig == signal.SIGTERM:
        _resume_completes(served, out, sorted(ids))


@pytest.mark.skipif(
    not Path("/proc/self/status").exists(), reason="reads signal delivery from /proc (Linux)"
)
@pytest.mark.slow
def test_a_second_ctrl_c_abandons_the_point_but_still_reaches_the_safe_state(
    served: Served, tmp_path: Path
) -> None:
    """Ctrl-C during point 1, and again once the first has been delivered (the point takes
    over a second here): the point is abandoned, not stored; the safe state is still reached
    in order, the file says stopped, and resume completes the run."""
    out = tmp_path / "abandoned.h5"
    mark = len(served.entries())
    proc, text = _start(served, out)
    try:
        _wait_for_second_point(served, proc, out, mark)
        os.kill(proc.pid, signal.SIGINT)
        _wait_until_delivered(proc, signal.SIGINT)
        os.kill(proc.pid, signal.SIGINT)
        proc.wait(timeout=RUN_LIMIT_S)
    finally:
        _end(proc)
    assert proc.returncode == 1, _errors(text)  # stopped early: not 0
    outcome = _outcome(text)
    assert outcome["status"] == "stopped" and "abandoned" in outcome["reason"]
    assert "second stop request (SIGINT)" in outcome["reason"]
    assert read_meta(out)["status"] == "stopped"
    assert list(read_results(out)["point_id"]) == [0]  # the abandoned point was not stored
    _check_safe(served, mark)
    _resume_completes(served, out, [0])


def test_stop_requests_during_the_safe_state_do_not_interrupt_it(tmp_path: Path) -> None:
    """Ctrl-C pressed again and again while the bench is being made safe (in-process, the
    signals sent to this process from the run's own event): recorded, never raised; every
    instrument reaches the safe state, verified, in order."""
    from benchseq.stopping import StopControl

    stop = StopControl()
    keeper = Keeper()
    sent = {"n": 0}

    def emit(event: Any) -> None:
        if event.kind == "point_stored" and event.done == 1:
            stop.request("test stop")
        if event.kind == "state" and event.message.startswith("going to the safe state"):
            for _ in range(3):
                handled = stop.count
                os.kill(os.getpid(), signal.SIGINT)
                sent["n"] += 1
                # handled in this (the main) thread at the next bytecode boundary: wait for
                # it, so that the next signal is not merged with this one
                deadline = time.monotonic() + 10.0
                while stop.count == handled and time.monotonic() < deadline:
                    pass
                assert stop.count == handled + 1

    with stop.installed():
        outcome, path = start_run(
            str(_plan_file(tmp_path)), f"sim:{SCENARIO}", str(tmp_path / "shielded.h5"),
            seed=2, emit=emit, stop=stop, session_factory=keeper,
        )  # fmt: skip
    assert sent["n"] == 3 and stop.count == 4  # the test's request and three signals
    assert outcome.status == "stopped"
    assert [s.split(":")[0] for s in outcome.safe_state] == ["generator", "load", "supply"]
    assert all("verified" in s for s in outcome.safe_state), outcome.safe_state
    _in_process_safe(keeper.sessions[0])
    assert read_meta(path)["status"] == "stopped"


# -- exceptions during a point (in-process: the simulator's own log) -----------------------------
def _in_process_safe(session: Any) -> None:
    log = session.simulator.log
    switches = [(c.role, bool(c.value)) for c in log if c.what in ("output", "input")]
    assert switches[-3:] == SAFE, switches
    supply = [(c.what, c.value) for c in log if c.role == "supply"]
    assert supply[-2:] == [("output", False), ("voltage", 0.0)]
    truth = session.simulator.truth()
    assert not truth.generator_on
    assert not session.simulator.load.settings.input
    assert not session.simulator.supply.settings.output


def _plan_file(folder: Path) -> Path:
    path = folder / "plan.toml"
    path.write_text(PLAN, encoding="utf-8")
    return path


def test_an_unexpected_exception_during_a_point_aborts_through_the_safe_state(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A programming error in the middle of the third point (raised from the analysis):
    the run aborts, keeps the traceback in the file, the bench goes safe in order, the two
    points before are intact and resume completes the run."""
    from benchseq import analysis

    real = analysis.measure_point
    calls = {"n": 0, "stored": 0}

    def measure_point(*args: Any, **kwargs: Any) -> Any:
        if calls["stored"] == 2:
            raise RuntimeError("simulated programming error in the analysis")
        calls["n"] += 1
        return real(*args, **kwargs)

    def emit(event: Any) -> None:
        if event.kind == "point_stored":
            calls["stored"] += 1

    monkeypatch.setattr(analysis, "measure_point", measure_point)
    keeper = Keeper()
    outcome, path = start_run(
        str(_plan_file(tmp_path)), f"sim:{SCENARIO}", str(tmp_path / "exc.h5"),
        seed=2, emit=emit, session_factory=keeper,
    )  # fmt: skip
    monkeypatch.setattr(analysis, "measure_point", real)
    assert outcome.status == "aborted" and "RuntimeError" in outcome.reason
    meta = read_meta(path)
    assert meta["status"] == "aborted" and "simulated programming error" in meta["traceback"]
    _in_process_safe(keeper.sessions[0])
    assert sorted(read_results(path)["point_id"]) == [0, 1]
    again, _ = resume_run(str(path), session_factory=keeper)
    assert again is not None and again.status == "complete" and again.skipped == 2
    assert sorted(read_results(path)["point_id"]) == list(range(POINTS))
    _in_process_safe(keeper.sessions[1])


def test_an_instrument_that_fails_during_a_point_aborts_through_the_safe_state(
    tmp_path: Path,
) -> None:
    """The scope's connection drops on every message from the second point on: after the
    recoveries the run aborts naming the scope, and the other instruments go safe in order."""
    keeper = Keeper()

    def emit(event: Any) -> None:
        if event.kind == "point_stored" and event.done == 1:
            keeper.sessions[-1].simulator.faults["scope"].rates = FaultRates(disconnect=1.0)

    outcome, path = start_run(
        str(_plan_file(tmp_path)), f"sim:{SCENARIO}", str(tmp_path / "lost.h5"),
        seed=2, emit=emit, session_factory=keeper,
    )  # fmt: skip
    assert outcome.status == "aborted" and "SIM::scope" in outcome.reason
    assert [s.split(":")[0] for s in outcome.safe_state] == ["generator", "load", "supply"]
    assert all("verified" in s for s in outcome.safe_state), outcome.safe_state
    _in_process_safe(keeper.sessions[0])
    assert sorted(read_results(path)["point_id"]) == [0]
    assert read_meta(path)["status"] == "aborted"
