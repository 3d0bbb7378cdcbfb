"""A bench session: the four role objects of one bench, their clock, and the safe state.

Real benches get one pyvisa ResourceManager per session (pyvisa-py, "@py", unless the
bench file's lab.visa_library names another) and a monotonic clock; the embedded
simulated bench gets the simulator's in-process transports and its virtual clock. All
profiles are read and checked before any connection is opened, and nothing is switched on
here: opening a session only identifies the instruments and clears their status.
"""

from __future__ import annotations

import contextlib
import math
import threading
import time
import warnings
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

from benchseq.bench import Bench
from benchseq.drivers.errors import ConnectionLost, InstrumentError, InstrumentReportedError
from benchseq.drivers.factory import build_instrument, profile_for
from benchseq.drivers.generator import Generator
from benchseq.drivers.instrument import AMBIGUOUS, Instrument, is_passing
from benchseq.drivers.load import Load
from benchseq.drivers.profile import Profile
from benchseq.drivers.scope import Scope
from benchseq.drivers.supply import Supply
from benchseq.drivers.transport import Transport

SAFE_ORDER = ("generator", "load", "supply")  # common practice: generator, load, then supply
# pauses (s) between rounds of the safe state while an instrument cannot be made safe; the
# last is repeated until the bench's outage patience runs out
SAFE_STATE_PAUSES_S = (0.25, 0.5, 1.0, 2.0, 5.0, 10.0)


class SafeStepRefused(InstrumentError):
    """An instrument refused a safe-state command (e.g. a set-point out of its range):
    sending it again would not help, so the safe state does not."""


@dataclass
class SafeStateReport:
    """What the safe state did: one line per instrument, and what it could NOT make safe
    (empty when every instrument is safe, verified by read-back)."""

    steps: list[str]
    not_safe: list[str]
    rounds: int = 1
    took_s: float = 0.0

    @property
    def complete(self) -> bool:
        return not self.not_safe

    def __iter__(self) -> Iterator[str]:  # older callers read the steps as a list
        return iter(self.steps)

    def __getitem__(self, index: int) -> str:
        return self.steps[index]

    def __len__(self) -> int:
        return len(self.steps)


class MonotonicClock:
    """Real time for real benches: now() in s (monotonic), sleep(s)."""

    real_time = True  # bench time is wall time

    def now(self) -> float:
        return time.monotonic()

    def sleep(self, seconds: float) -> None:
        if seconds > 0:
            time.sleep(seconds)

    def sleep_unless(self, seconds: float, event: threading.Event) -> None:
        """Sleep ``seconds`` or until ``event`` is set (checked every 50 ms), whichever is
        first (a stop request ends a long wait during power-up)."""
        deadline = time.monotonic() + seconds
        while not event.is_set():
            left = deadline - time.monotonic()
            if left <= 0:
                return
            time.sleep(min(left, 0.05))


@dataclass
class BenchSession:
    """The open bench. ``connect(role)`` opens a FRESH transport to one instrument."""

    bench: Bench
    generator: Generator
    supply: Supply
    scope: Scope
    load: Load | None
    clock: Any
    identities: dict[str, str]
    connect: Callable[[str], Transport]
    profiles: dict[str, Profile]
    simulator: Any = None
    on_close: Callable[[], None] | None = None
    closed: bool = field(default=False, init=False)

    def instruments(self) -> dict[str, Instrument]:
        found: dict[str, Instrument] = {
            "generator": self.generator,
            "supply": self.supply,
            "scope": self.scope,
        }
        if self.load is not None:
            found["load"] = self.load
        return found

    def recover(self) -> None:
        """After an instrument fault: renew every connection and restore each instrument's
        known state, verified by read-back (raises if that fails)."""
        for instrument in self.instruments().values():
            instrument.recover()

    def safe_state(self, patience_s: float | None = None) -> SafeStateReport:
        """Generator output off, load input off, supply output off and then its set-point
        to the safe level, in that order, each on a FRESH connection (an interrupted read
        may have left stale data on the old one) and verified by read-back.

        An instrument that cannot be reached (refused or lost connection, no reply) or
        reads back wrong is tried again in later rounds, with growing pauses on the
        session's clock, until it is safe or ``patience_s`` (default: the bench's
        lab.outage_patience) has passed; a command the instrument refuses is not sent
        again. Never raises: returns what was done and what could not be made safe."""
        patience = self.bench.outage_patience if patience_s is None else patience_s
        roles = [role for role in SAFE_ORDER if role in self.instruments()]
        done: dict[str, str] = {}
        failed: dict[str, str] = {}
        refused: set[str] = set()
        started = self.clock.now()
        rounds = 0
        while True:
            rounds += 1
            for role in roles:
                if role in done or role in refused:
                    continue
                try:
                    done[role] = self._safe_one(role, self.instruments()[role])
                    failed.pop(role, None)
                except SafeStepRefused as exc:  # the instrument answered no: final
                    failed[role] = str(exc)
                    refused.add(role)
                except Exception as exc:  # the safe state goes on to the next instrument
                    failed[role] = str(exc)
            if all(role in done or role in refused for role in roles):
                break
            pause = SAFE_STATE_PAUSES_S[min(rounds - 1, len(SAFE_STATE_PAUSES_S) - 1)]
            if self.clock.now() - started + pause > patience:
                break
            self.clock.sleep(pause)
        steps = [
            done[role]
            if role in done
            else f"{role}: FAILED to reach the safe state: {failed[role]}"
            for role in roles
        ]
        not_safe = [f"{role}: {failed[role]}" for role in roles if role not in done]
        return SafeStateReport(steps, not_safe, rounds, self.clock.now() - started)

    def _safe_one(self, role: str, main: Instrument) -> str:
        try:
            transport = self.connect(role)
            how = "fresh connection"
        except InstrumentError as exc:
            main.transport.reconnect()
            transport, how = main.transport, f"old connection renewed (fresh one failed: {exc})"
        try:
            fresh = build_instrument(
                main.spec,
                transport,
                self.bench,
                profile=self.profiles[role],
                sleep=self.clock.sleep,
            )
            try:
                text = _make_safe(role, fresh, self.bench)
            finally:  # what was switched off stays known, even when a later step failed
                main.adopt(fresh.known_state_items())
        finally:
            if transport is not main.transport:
                transport.close()
        return f"{text} ({how})"

    def close(self) -> None:
        """Release every connection (the outputs are left as they are: call safe_state first)."""
        if self.closed:
            return
        self.closed = True
        for instrument in self.instruments().values():
            with contextlib.suppress(Exception):
                instrument.transport.close()
        if self.on_close is not None:
            self.on_close()


def _make_safe(role: str, instrument: Any, bench: Bench) -> str:
    if role == "generator":
        _refused_is_final("switching the output off", lambda: instrument.output(False))
        if instrument.output_is_on():
            raise InstrumentError(instrument.resource, "", "output still reads on")
        return "generator: output off, verified"
    if role == "load":
        _refused_is_final("switching the input off", lambda: instrument.input(False))
        if instrument.input_is_on():
            raise InstrumentError(instrument.resource, "", "input still reads on")
        return "load: input off, verified"
    # The supply: output off first (the supply never stays energised at a "safe level"),
    # then its set-point to the safe level, so the next switch-on starts from there.
    _refused_is_final("switching the output off", lambda: instrument.output(False))
    if instrument.output_is_on():
        raise InstrumentError(instrument.resource, "", "output still reads on")
    level = bench.supply.safe_level
    read_back = _refused_is_final(
        f"output off, verified; but setting its set-point to the safe level {level:g} V",
        lambda: instrument.configure("voltage", float(level), query_key="voltage_query"),
    )
    if read_back is not None and not math.isclose(read_back, level, rel_tol=1e-6, abs_tol=1e-9):
        raise InstrumentError(
            instrument.resource,
            "",
            f"set-point reads {read_back:g} V, not the safe level {level:g} V",
        )
    return f"supply: output off, verified; set-point at its safe level {level:g} V, verified"


def _refused_is_final(what: str, action: Callable[[], Any]) -> Any:
    """Run one safe-state command; the instrument refusing it (an error-queue entry that is
    not of the passing kind) is SafeStepRefused: sending it again would not help."""
    try:
        return action()
    except InstrumentReportedError as exc:
        if is_passing(exc):
            raise
        raise SafeStepRefused(
            exc.resource,
            exc.command,
            f"{what} was refused: instrument error {exc.code}, {exc.message!r}",
        ) from exc


def assemble_session(
    bench: Bench,
    connect: Callable[[str], Transport],
    clock: Any,
    *,
    simulator: Any = None,
    on_close: Callable[[], None] | None = None,
) -> BenchSession:
    """Check every profile, connect, build the role objects, identify and clear status."""
    profiles = {role: profile_for(spec, bench) for role, spec in bench.instruments.items()}
    built: dict[str, Instrument] = {}
    role = ""
    try:
        for role, spec in bench.instruments.items():
            built[role] = build_instrument(
                spec, connect(role), bench, profile=profiles[role], sleep=clock.sleep
            )
        identities = {}
        for role, instrument in built.items():
            identities[role] = instrument.identify().strip()
            _clear_status(instrument)
    except BaseException as exc:
        for instrument in built.values():
            with contextlib.suppress(Exception):
                instrument.transport.close()
        if on_close is not None:
            on_close()
        if isinstance(exc, InstrumentError) and role:
            # same class and fields; the message says which role of the bench failed
            exc.args = (f"opening the bench, the {role}: {exc}",)
        raise
    load = built.get("load")
    return BenchSession(
        bench=bench,
        generator=built["generator"],  # type: ignore[arg-type]
        supply=built["supply"],  # type: ignore[arg-type]
        scope=built["scope"],  # type: ignore[arg-type]
        load=load,  # type: ignore[arg-type]
        clock=clock,
        identities=identities,
        connect=connect,
        profiles=profiles,
        simulator=simulator,
        on_close=on_close,
    )


def _clear_status(instrument: Instrument) -> None:
    try:
        instrument.clear_status()
    except AMBIGUOUS:
        instrument.transport.reconnect()
        instrument.clear_status()


def open_session(bench: Bench, seed: int = 0, faults: dict[str, Any] | None = None) -> BenchSession:
    """Open every instrument of ``bench``: the simulator's for a simulated bench, else VISA."""
    if bench.simulation is not None:
        # The simulator is imported only for simulated benches.
        from benchseq.sim.world import SimulatedBench

        simulator = SimulatedBench.from_scenario(
            bench.simulation, bench=bench, seed=seed, faults=faults
        )
        return assemble_session(bench, simulator.transport, simulator.clock, simulator=simulator)

    import pyvisa

    from benchseq.drivers.visa import VisaTransport

    manager = _resource_manager(bench.visa_library)
    profiles = {role: profile_for(spec, bench) for role, spec in bench.instruments.items()}

    def connect(role: str) -> Transport:
        io = profiles[role].io
        return VisaTransport(
            manager,
            bench.instruments[role],
            io.write_termination,
            io.read_termination,
            block_terminated=io.block_terminated,
        )

    def release() -> None:
        with contextlib.suppress(pyvisa.Error, OSError):
            manager.close()

    return assemble_session(bench, connect, MonotonicClock(), on_close=release)


def _resource_manager(visa_library: str) -> Any:
    import pyvisa

    try:
        return pyvisa.ResourceManager(visa_library)
    except (OSError, ValueError, pyvisa.Error) as exc:
        raise ConnectionLost(
            f"VISA library {visa_library!r}", "", f"cannot load it ({exc}); '@py' is pyvisa-py"
        ) from None


# -- scan ----------------------------------------------------------------------------------
@dataclass(frozen=True)
class ScanEntry:
    """One VISA resource and its *IDN? reply, or why it gave none."""

    resource: str
    identity: str | None = None
    error: str | None = None


def scan(
    visa_library: str = "@py",
    timeout_s: float = 1.0,
    resources: Sequence[str] | None = None,
    total_timeout_s: float = 20.0,
) -> list[ScanEntry]:
    """List the backend's resources (plus ``resources``, e.g. TCPIP SOCKET addresses, which
    cannot be discovered) and ask each *IDN? with ``timeout_s``. The whole scan returns
    within about ``total_timeout_s`` whatever the instruments do."""
    entries: list[ScanEntry] = []
    listed: list[str] = []
    lock = threading.Lock()
    started = time.monotonic()

    def work() -> None:
        try:
            manager = _resource_manager(visa_library)
        except InstrumentError as exc:
            with lock:
                entries.append(ScanEntry(f"VISA library {visa_library}", None, exc.problem))
            return
        try:
            try:
                with warnings.catch_warnings():
                    # pyvisa-py warns that discovery is limited without optional packages
                    warnings.simplefilter("ignore")
                    found = list(manager.list_resources())
            except Exception as exc:  # a backend that cannot list is reported, not raised
                found = []
                with lock:
                    entries.append(ScanEntry("(list resources)", None, str(exc)))
            names = list(dict.fromkeys([*found, *(resources or ())]))
            with lock:
                listed.extend(names)
            for name in names:
                if time.monotonic() - started > total_timeout_s:
                    return
                entry = _probe(manager, name, timeout_s)
                with lock:
                    entries.append(entry)
        finally:
            with contextlib.suppress(Exception):
                manager.close()

    worker = threading.Thread(target=work, name="benchseq-scan", daemon=True)
    worker.start()
    worker.join(total_timeout_s)
    with lock:
        done = {e.resource for e in entries}
        result = list(entries)
        result += [
            ScanEntry(name, None, "not asked: the scan's time limit ran out")
            for name in listed
            if name not in done
        ]
    return result


def _probe(manager: Any, name: str, timeout_s: float) -> ScanEntry:
    from benchseq.bench import InstrumentSpec
    from benchseq.drivers.visa import VisaTransport

    spec = InstrumentSpec("scan", name, "", None, 1, timeout_s)
    try:
        transport = VisaTransport(manager, spec, "\n", "\n", open_timeout_s=timeout_s)
    except InstrumentError as exc:
        return ScanEntry(name, None, exc.problem)
    try:
        return ScanEntry(name, transport.query("*IDN?").strip(), None)
    except InstrumentError as exc:
        return ScanEntry(name, None, exc.problem)
    finally:
        transport.close()
