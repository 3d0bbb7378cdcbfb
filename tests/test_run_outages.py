"""Network outages, the safe state and stops during power-up.

Over TCP: `benchseq sim serve --scenario amplifier --log` in its own process, a proxy on
127.0.0.1 between it and `benchseq run` (tests/outageproxy.py) that resets every connection
and refuses new ones for a chosen time, and the instruments' states taken from the server's
state-change log and by asking them over SCPI afterwards, never from benchseq's own claims.
In-process: the embedded simulated bench with its virtual clock, an outage on that clock
(no real waiting), so long outages and patience run at once.

The shut-down order (generator, then electronic load, then supply) and "limits before
outputs" are common practice for bench supplies; the supply is switched off before its
set-point goes to the safe level, so it never stays energised at a "safe level".
Every process is started with a time limit and ended by its pid in a finally."""

from __future__ import annotations

import dataclasses
import json
import math
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
from outageproxy import OutageProxy

from benchseq import journal as jr
from benchseq.bench import embedded_bench_text, load_bench
from benchseq.drivers.errors import ConnectionLost
from benchseq.drivers.session import open_session
from benchseq.runner import start_run
from benchseq.sim.server import read_state_log, tcp_bench_text, wait_for_port
from benchseq.stopping import StopControl
from benchseq.store import journal_path, read_meta, read_results

pytestmark = pytest.mark.skipif(os.name != "posix", reason="POSIX signals and sockets")

SCENARIO = "amplifier"
ROLES = ("generator", "supply", "scope", "load")  # the bench file's order: ports base + k
SWITCHES = {"generator": "OUTP1?", "load": "INP1?", "supply": "OUTP1?"}
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
after_operating_point = "0.2 s"
[capture]
max_time = "1 s"
target_uncertainty = "0.2 dB"
"""
POINTS = 4
SAFE = [("generator", False), ("load", False), ("supply", False)]
RUN_LIMIT_S = 180.0


def _with_patience(text: str, patience: str) -> str:
    return text.replace("[lab]\n", f'[lab]\noutage_patience = "{patience}"\n', 1)


def _plan_file(folder: Path) -> Path:
    path = folder / "plan.toml"
    path.write_text(PLAN, encoding="utf-8")
    return path


# -- the served bench, the proxy and the run ---------------------------------------------------
class Served:
    """A `benchseq sim serve` process: its ports and state-change log."""

    def __init__(self, folder: Path, proc: subprocess.Popen[bytes], base: int) -> None:
        self.folder = folder
        self.proc = proc
        self.ports = {role: base + k for k, role in enumerate(ROLES)}
        self.log = folder / "states.jsonl"

    def bench_file(self, name: str, ports: dict[str, int], patience: str) -> Path:
        addresses = {r: f"TCPIP::127.0.0.1::{p}::SOCKET" for r, p in ports.items()}
        text = tcp_bench_text(load_bench(f"sim:{SCENARIO}").text, addresses, SCENARIO)
        path = self.folder / f"{name}.bench.toml"
        path.write_text(_with_patience(text, patience), encoding="utf-8")
        return path

    def entries(self) -> list[dict[str, Any]]:
        return read_state_log(self.log) if self.log.exists() else []

    def ask(self, role: str, command: str) -> str:
        """One SCPI message on a fresh connection straight to the server (not the proxy)."""
        with socket.create_connection(("127.0.0.1", self.ports[role]), timeout=5.0) as conn:
            conn.sendall(command.encode("ascii") + b"\n")
            if not command.endswith("?"):
                return ""
            reply = b""
            while not reply.endswith(b"\n"):
                chunk = conn.recv(4096)
                if not chunk:
                    break
                reply += chunk
        return reply.decode("ascii").strip()

    def switched_on(self) -> dict[str, bool]:
        return {role: self.ask(role, q) == "1" for role, q in SWITCHES.items()}


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


@pytest.fixture
def proxy(served: Served) -> Iterator[OutageProxy]:
    with OutageProxy(served.ports) as running:
        yield running


def _start(served: Served, bench: Path, out: Path) -> tuple[subprocess.Popen[bytes], Path]:
    """`benchseq run --json`: stdout (the outcome alone) to OUT.stdout, stderr (the run's
    lines, warnings, the alarm) to OUT.stderr."""
    text = out.with_suffix(".stdout")
    with open(text, "wb") as sink, open(text.with_suffix(".stderr"), "wb") as err:
        proc = subprocess.Popen(
            [sys.executable, "-m", "benchseq", "run", str(_plan_file(served.folder)),
             "--bench", str(bench), "--out", str(out), "--json"],
            stdout=sink, stderr=err, cwd=served.folder,
            env={**os.environ, "COLUMNS": "200"},
        )  # fmt: skip
    return proc, text


def _finish(proc: subprocess.Popen[bytes], text: Path) -> tuple[str, dict[str, Any]]:
    """What the run wrote to stderr, and its outcome: stdout parsed whole as JSON."""
    try:
        proc.wait(timeout=RUN_LIMIT_S)
    finally:
        _end(proc)
    output = text.with_suffix(".stderr").read_text(encoding="utf-8")
    assert "Traceback" not in output, output
    return output, json.loads(text.read_text(encoding="utf-8"))


def _points_in_journal(out: Path) -> int:
    jpath = journal_path(out)
    if not jpath.exists():
        return 0
    return sum(1 for r in jr.scan(jpath).records if r.body.get("kind") == "point")


def _wait_for(condition: Any, proc: subprocess.Popen[bytes], what: str) -> None:
    """Poll ``condition()`` until true (deadline RUN_LIMIT_S); the run must still be going."""
    deadline = time.monotonic() + RUN_LIMIT_S
    while time.monotonic() < deadline:
        if condition():
            return
        assert proc.poll() is None, f"the run ended before {what}"
        time.sleep(0.02)
    pytest.fail(f"not within {RUN_LIMIT_S} s: {what}")


def _switches(entries: list[dict[str, Any]]) -> list[tuple[str, bool]]:
    return [(e["role"], bool(e["value"])) for e in entries if e["what"] in ("output", "input")]


def _check_safe(served: Served, after: int) -> None:
    """Since log entry ``after``: the outputs went off in the safe order, nothing went on
    after the generator went off, the supply's output went off before its set-point went to
    0 V; and the instruments say so when asked."""
    entries = served.entries()[after:]
    assert _switches(entries)[-3:] == SAFE, _switches(entries)
    generator_off = max(i for i, e in enumerate(entries) if e["role"] == "generator"
                        and e["what"] == "output" and not e["value"])  # fmt: skip
    later = entries[generator_off:]
    assert not any(e["value"] is True for e in later if e["what"] in ("output", "input"))
    supply = [(e["what"], e["value"]) for e in later if e["role"] == "supply"]
    assert supply[-2:] == [("output", False), ("voltage", 0.0)], supply
    assert served.switched_on() == {"generator": False, "load": False, "supply": False}
    assert float(served.ask("supply", "SOUR1:VOLT?")) == 0.0


def _switch_off_by_hand(served: Served) -> None:
    """What the operator does after a run that could not make the bench safe."""
    for role, command in (
        ("generator", "OUTP1 OFF"),
        ("load", "INP1 OFF"),
        ("supply", "OUTP1 OFF"),
    ):
        served.ask(role, command)


# -- outages over TCP ------------------------------------------------------------------------------
@pytest.mark.slow
def test_a_short_outage_during_a_point_is_ridden_through_over_tcp(
    served: Served, proxy: OutageProxy, tmp_path: Path
) -> None:
    """A 1.5 s outage (every connection reset, new ones refused) just after the first point:
    the run reconnects with pauses, restores each instrument's state, measures the point
    again and completes; exit 0; the bench ends safe in order. A run on real (not
    simulated) instruments starts with the caution, and goes on without asking."""
    bench = served.bench_file("ride", proxy.ports, "1 min")
    out = tmp_path / "ride.h5"
    mark = len(served.entries())
    proc, text = _start(served, bench, out)
    _wait_for(lambda: _points_in_journal(out) >= 1, proc, "the first point was stored")
    proxy.outage(1.5)
    output, outcome = _finish(proc, text)
    assert proc.returncode == 0, output
    assert outcome["status"] == "complete" and outcome["not_safe"] == []
    frame = read_results(out).sort_values("point_id")
    assert list(frame["point_id"]) == list(range(POINTS))
    assert frame["flags"].str.contains("instrument_retry").any()  # the point measured again
    assert "instruments reachable again" in output
    _check_safe(served, mark)
    caution = output[: output.index("points to measure")]
    assert "caution:" in caution and "qualified practice" in caution
    for topic in ("protective earth", "Shut-down order", "run hot", "hold charge", "limits"):
        assert topic in caution, topic


@pytest.mark.slow
def test_an_outage_outlasting_the_patience_and_the_safe_state_exits_1_and_says_so(
    served: Served, proxy: OutageProxy, tmp_path: Path
) -> None:
    """Patience 1 s, outage 8 s: the run gives up riding through, the safe state keeps
    trying for its patience and cannot reach anything. It must not claim safety: exit 1,
    every instrument listed as not made safe, and (checked on the simulator once the link
    is back) the bench really is still on, as reported."""
    bench = served.bench_file("outlast", proxy.ports, "1 s")
    out = tmp_path / "outlast.h5"
    proc, text = _start(served, bench, out)
    _wait_for(lambda: _points_in_journal(out) >= 1, proc, "the first point was stored")
    proxy.outage(8.0)
    output, outcome = _finish(proc, text)
    assert proc.returncode == 1, output
    assert outcome["status"] == "aborted" and "outage patience" in outcome["reason"]
    assert [line.split(":")[0] for line in outcome["not_safe"]] == ["generator", "load", "supply"]
    assert "THE BENCH WAS NOT MADE SAFE" in output
    assert read_meta(out)["status"] == "aborted" and "NOT MADE SAFE" in read_meta(out)["reason"]
    assert proxy.wait_up(30.0)
    assert served.switched_on() == {"generator": True, "load": True, "supply": True}
    _switch_off_by_hand(served)


@pytest.mark.slow
def test_an_outage_that_ends_during_the_safe_state_still_makes_the_bench_safe(
    served: Served, proxy: OutageProxy, tmp_path: Path
) -> None:
    """Patience 4 s, outage 6 s: riding through gives up after about 4 s, then the safe
    state goes on trying (pauses 0.25, 0.5, 1, 2 s: its last try comes after the link is
    back) and reaches every instrument, verified. The run still failed: exit 1."""
    bench = served.bench_file("late", proxy.ports, "4 s")
    out = tmp_path / "late.h5"
    mark = len(served.entries())
    proc, text = _start(served, bench, out)
    _wait_for(lambda: _points_in_journal(out) >= 1, proc, "the first point was stored")
    proxy.outage(6.0)
    output, outcome = _finish(proc, text)
    assert proc.returncode == 1, output
    assert outcome["status"] == "aborted" and outcome["not_safe"] == []
    assert all("verified" in step for step in outcome["safe_state"]), outcome["safe_state"]
    _check_safe(served, mark)


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_a_stop_signal_during_the_ramp_interrupts_power_up_over_the_cli(
    served: Served, tmp_path: Path, sig: signal.Signals
) -> None:
    """SIGINT or SIGTERM while the supply ramps towards 5 V (seen in the server's log): the ramp ends
    where it is, the load and the generator are never switched on, the bench goes safe;
    the run says stopped with nothing measured (exit 0)."""
    bench = served.bench_file("direct", served.ports, "1 min")
    out = tmp_path / f"stop-ramp-{sig.name}.h5"
    mark = len(served.entries())
    proc, text = _start(served, bench, out)

    def ramping() -> bool:
        volts = [e["value"] for e in served.entries()[mark:] if e["role"] == "supply"
                 and e["what"] == "voltage"]  # fmt: skip
        return any(0.0 < float(v) < 5.0 for v in volts)

    _wait_for(ramping, proc, "the supply ramp started")
    os.kill(proc.pid, sig)
    output, outcome = _finish(proc, text)
    assert proc.returncode == 1, output  # a run stopped before it finished exits 1
    assert outcome["status"] == "stopped" and outcome["measured"] == 0
    assert outcome["reason"].startswith(f"{sig.name} received during the DC ramp"), outcome

    entries = served.entries()[mark:]
    volts = [float(e["value"]) for e in entries if e["role"] == "supply" and e["what"] == "voltage"]
    assert max(volts) < 5.0, volts  # the ramp never reached the operating point
    # the load and the generator never went on; the supply went off, then to 0 V
    assert _switches(entries) == [("supply", True), ("supply", False)], _switches(entries)
    supply = [(e["what"], e["value"]) for e in entries if e["role"] == "supply"]
    assert supply[-2:] == [("output", False), ("voltage", 0.0)], supply
    assert served.switched_on() == {"generator": False, "load": False, "supply": False}
    assert _points_in_journal(out) == 0


# -- outages in-process, on the virtual clock -------------------------------------------------------
class _Outage:
    """An outage on the simulated bench's virtual clock, from ``start`` for ``length`` s."""

    def __init__(self) -> None:
        self.start = math.inf
        self.length = 0.0
        self.clock: Any = None

    def begin(self, length: float) -> None:
        self.start, self.length = self.clock.now(), length

    @property
    def active(self) -> bool:
        return self.start <= self.clock.now() < self.start + self.length


class _OutageTransport:
    """An in-process transport that is refused during an outage; a connection open when an
    outage begins is dead until reconnected after it."""

    def __init__(self, inner: Any, outage: _Outage) -> None:
        self.inner, self.outage = inner, outage
        self.resource = inner.resource
        self.dead = False

    @property
    def timeout_s(self) -> float:
        return float(self.inner.timeout_s)

    @timeout_s.setter
    def timeout_s(self, value: float) -> None:
        self.inner.timeout_s = value

    def _check(self, command: str) -> None:
        if self.outage.active:
            self.dead = True
        if self.dead:
            raise ConnectionLost(self.resource, command, "connection reset")

    def write(self, command: str) -> None:
        self._check(command)
        self.inner.write(command)

    def query(self, command: str) -> str:
        self._check(command)
        return str(self.inner.query(command))

    def query_block(self, command: str) -> bytes:
        self._check(command)
        return bytes(self.inner.query_block(command))

    def clear(self) -> None:
        self._check("")
        self.inner.clear()

    def reconnect(self) -> None:
        if self.outage.active:
            raise ConnectionLost(self.resource, "", "cannot open: connection refused")
        self.inner.reconnect()
        self.dead = False

    def close(self) -> None:
        self.inner.close()


class _OutageBench(Keeper):
    """A session factory: the embedded simulated bench behind an outage switch."""

    def __init__(self, safe_level: float | None = None) -> None:
        super().__init__()
        self.outage = _Outage()
        self.safe_level = safe_level

    def __call__(self, bench: Any, seed: int = 0, faults: Any = None) -> Any:
        if self.safe_level is not None:  # what the session applies (the check saw the file)
            supply = dataclasses.replace(bench.supply, safe_level=self.safe_level)
            bench = dataclasses.replace(bench, supply=supply)
        session = open_session(bench, seed=seed, faults=faults)
        self.outage.clock = session.clock
        for instrument in session.instruments().values():
            instrument.transport = _OutageTransport(instrument.transport, self.outage)
        fresh = session.connect

        def connect(role: str) -> Any:
            if self.outage.active:
                raise ConnectionLost(f"SIM::{role}", "", "cannot open: connection refused")
            return _OutageTransport(fresh(role), self.outage)

        session.connect = connect
        self.sessions.append(session)
        return session


def _sim_bench_file(folder: Path, patience: str) -> Path:
    path = folder / "sim.bench.toml"
    path.write_text(_with_patience(embedded_bench_text(SCENARIO), patience), encoding="utf-8")
    return path


def _in_process_safe(session: Any) -> None:
    log = session.simulator.log
    switches = [(c.role, bool(c.value)) for c in log if c.what in ("output", "input")]
    assert switches[-3:] == SAFE, switches
    assert not session.simulator.truth().generator_on
    assert not session.simulator.load.settings.input
    assert not session.simulator.supply.settings.output


def _run_with_outage(
    tmp_path: Path, patience: str, length: float, during_ramp: bool = False, **kw: Any
) -> Any:
    """A run of PLAN on the simulated bench; an outage of ``length`` virtual seconds begins
    just after the first point is stored (or as the DC ramp of power-up begins)."""
    bench = _OutageBench(**kw)
    events: list[Any] = []

    def emit(event: Any) -> None:
        events.append(event)
        if length <= 0 or bench.outage.start < math.inf:
            return
        ramping = event.kind == "state" and event.message.startswith("ramping DC")
        if (event.kind == "point_stored" and event.done == 1) or (during_ramp and ramping):
            bench.outage.begin(length)

    outcome, path = start_run(
        str(_plan_file(tmp_path)), str(_sim_bench_file(tmp_path, patience)),
        str(tmp_path / "run.h5"), seed=4, emit=emit, session_factory=bench,
    )  # fmt: skip
    return outcome, path, bench, events


def test_an_outage_shorter_than_the_patience_is_ridden_through_on_the_virtual_clock(
    tmp_path: Path,
) -> None:
    """A 40 s outage with the default 5 min patience: the pauses run on the session's clock,
    the point is measured again, the run completes and ends safe."""
    outcome, path, bench, events = _run_with_outage(tmp_path, "5 min", 40.0)
    assert outcome.status == "complete" and not outcome.not_safe
    assert outcome.bench_time > 40.0  # the wait was on the bench's clock
    frame = read_results(path).sort_values("point_id")
    assert list(frame["point_id"]) == list(range(POINTS))
    assert list(frame["flags"].str.contains("instrument_retry")) == [False, True, False, False]
    assert any("instruments reachable again" in e.message for e in events)
    _in_process_safe(bench.sessions[0])


def test_an_outage_during_power_up_is_ridden_through_and_the_ramp_goes_on(
    tmp_path: Path,
) -> None:
    """A 30 s outage as the DC ramp begins: power-up is recovered (the supply's state
    restored, verified) and carried on from where the ramp was; every point is measured."""
    outcome, path, bench, events = _run_with_outage(tmp_path, "5 min", 30.0, during_ramp=True)
    assert outcome.status == "complete" and not outcome.not_safe
    assert outcome.bench_time > 30.0
    assert any("during power-up" in e.message for e in events if e.kind == "warning")
    assert sorted(read_results(path)["point_id"]) == list(range(POINTS))
    log = bench.sessions[0].simulator.log
    volts = [float(c.value) for c in log if c.role == "supply" and c.what == "voltage"]
    assert max(volts) == pytest.approx(5.0)  # never beyond the operating point
    _in_process_safe(bench.sessions[0])


def test_an_outage_longer_than_the_patience_stops_the_run_and_names_what_is_not_safe(
    tmp_path: Path,
) -> None:
    """Patience 1 min, outage 1 h: riding through gives up after at most a minute, the safe
    state tries for another minute and cannot reach anything; the outcome lists all three
    instruments, and the simulator shows they are indeed still on (nothing claimed)."""
    outcome, path, bench, _ = _run_with_outage(tmp_path, "1 min", 3600.0)
    assert outcome.status == "aborted" and "outage patience (60 s" in outcome.reason
    assert [line.split(":")[0] for line in outcome.not_safe] == ["generator", "load", "supply"]
    assert "NOT MADE SAFE" in read_meta(path)["reason"]
    sim = bench.sessions[0].simulator
    assert sim.truth().generator_on and sim.supply.settings.output and sim.load.settings.input
    assert outcome.bench_time < 1000.0  # bounded: two patiences and a point, not the outage


def test_an_outage_ending_within_the_safe_state_patience_ends_safe(tmp_path: Path) -> None:
    """Patience 1 min, outage 100 s: riding through gives up, the safe state reaches every
    instrument once the link is back (within its own minute), verified."""
    outcome, _, bench, _ = _run_with_outage(tmp_path, "1 min", 100.0)
    assert outcome.status == "aborted" and not outcome.not_safe
    assert all("verified" in step for step in outcome.safe_state)
    _in_process_safe(bench.sessions[0])


def test_a_stop_request_ends_the_wait_for_a_lost_link(tmp_path: Path) -> None:
    """A stop requested while the run waits for the instruments to come back ends the wait
    at once (not after the patience); the safe state then still tries for its patience
    and, the link being down, says what it could not make safe."""
    bench = _OutageBench()
    stop = StopControl()

    def emit(event: Any) -> None:
        if event.kind == "point_stored" and event.done == 1:
            bench.outage.begin(3600.0)
        if event.kind == "warning" and "cannot reach the instruments" in event.message:
            stop.request("test stop")

    outcome, _ = start_run(
        str(_plan_file(tmp_path)), str(_sim_bench_file(tmp_path, "5 min")),
        str(tmp_path / "run.h5"), seed=4, emit=emit, stop=stop, session_factory=bench,
    )  # fmt: skip
    assert outcome.status == "stopped"
    assert "test stop while the instruments could not be reached" in outcome.reason
    assert [line.split(":")[0] for line in outcome.not_safe] == ["generator", "load", "supply"]
    assert outcome.bench_time < 300.0 + 120.0  # the safe state's patience, not two of them


def test_the_supply_goes_off_before_its_set_point_goes_to_the_safe_level(tmp_path: Path) -> None:
    """A 2 V safe level: the output goes off (read back) first, then the set-point goes to
    2 V; the output stays off: the supply is never left energised at its safe level."""
    outcome, _, bench, _ = _run_with_outage(tmp_path, "5 min", 0.0, safe_level=2.0)
    assert outcome.status == "complete" and not outcome.not_safe
    log = bench.sessions[0].simulator.log
    supply = [(c.what, c.value) for c in log if c.role == "supply"]
    assert supply[-2:] == [("output", False), ("voltage", 2.0)], supply
    assert not bench.sessions[0].simulator.supply.settings.output
    assert "safe level 2 V, verified" in outcome.safe_state[-1]


def test_a_safe_level_the_supply_refuses_is_never_a_success(tmp_path: Path) -> None:
    """A safe level of 100 V, beyond what the simulated supply accepts (SCPI -222, data out
    of range, SCPI-1999 vol. 2 ch. 21): the output is off, verified, but the step failed;
    the outcome lists the supply as not made safe and the refusal is not sent again."""
    outcome, _, bench, _ = _run_with_outage(tmp_path, "5 min", 0.0, safe_level=100.0)
    assert [line.split(":")[0] for line in outcome.not_safe] == ["supply"]
    assert "-222" in outcome.not_safe[0] and "output off, verified" in outcome.not_safe[0]
    sim = bench.sessions[0].simulator
    assert not sim.supply.settings.output
    attempts = [c for c in sim.log if c.role == "supply" and c.what == "output" and not c.value]
    assert len(attempts) == 1  # switched off once: the refused step was not retried in rounds


def test_a_refused_safe_step_makes_the_run_command_exit_1(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """Through the command line: the same refusal ends in exit 1 and a loud list."""
    from benchseq import cli
    from benchseq.drivers import session as session_module

    monkeypatch.setattr(session_module, "open_session", _OutageBench(safe_level=100.0))
    code = cli.main(
        ["run", str(_plan_file(tmp_path)), "--bench", f"sim:{SCENARIO}",
         "--out", str(tmp_path / "refused.h5"), "--seed", "4"]
    )  # fmt: skip
    shown = capsys.readouterr().out
    assert code == 1, shown
    assert "THE BENCH WAS NOT MADE SAFE" in shown and "-222" in shown
    assert "caution:" not in shown  # a simulated bench: no caution


class _HookClock:
    """The session's clock with a hook called before each sleep."""

    def __init__(self, inner: Any, hook: Any) -> None:
        self.inner, self.hook = inner, hook

    def now(self) -> float:
        return float(self.inner.now())

    def sleep(self, seconds: float) -> None:
        self.hook()
        self.inner.sleep(seconds)


@pytest.mark.parametrize("at_step", [1, 4, 9])
def test_a_stop_during_the_ramp_ends_power_up_on_the_virtual_clock(
    tmp_path: Path, at_step: int
) -> None:
    """The stop is requested from the clock at ramp step ``at_step`` (of 10 steps to 5 V):
    no further ramp step, no load, no generator, then the safe state in order."""
    stop = StopControl()
    keeper = Keeper()
    seen = {"ramping": False, "sleeps": 0}

    def hook() -> None:
        if seen["ramping"]:
            seen["sleeps"] += 1
            if seen["sleeps"] == at_step:
                stop.request("test stop")

    def factory(bench: Any, seed: int = 0, faults: Any = None) -> Any:
        session = keeper(bench, seed=seed, faults=faults)
        session.clock = _HookClock(session.clock, hook)
        return session

    def emit(event: Any) -> None:
        if event.kind == "state" and event.message.startswith("ramping DC"):
            seen["ramping"] = True

    outcome, path = start_run(
        str(_plan_file(tmp_path)), f"sim:{SCENARIO}", str(tmp_path / "ramp.h5"),
        seed=4, emit=emit, stop=stop, session_factory=factory,
    )  # fmt: skip
    assert outcome.status == "stopped" and outcome.measured == 0
    assert outcome.reason.startswith("test stop during the DC ramp"), outcome.reason
    log = keeper.sessions[0].simulator.log
    volts = [float(c.value) for c in log if c.role == "supply" and c.what == "voltage"]
    ramp = [v for v in volts if v > 0]
    assert len(ramp) == at_step and max(ramp) == pytest.approx(0.5 * at_step)
    # the load and the generator never went on; the supply went off, then to 0 V
    switches = [(c.role, c.value) for c in log if c.what in ("output", "input")]
    assert switches == [("supply", True), ("supply", False)], switches
    supply = [(c.what, c.value) for c in log if c.role == "supply"]
    assert supply[-2:] == [("output", False), ("voltage", 0.0)], supply
    sim = keeper.sessions[0].simulator
    assert not (sim.truth().generator_on or sim.load.settings.input or sim.supply.settings.output)
    assert read_meta(path)["status"] == "stopped"
