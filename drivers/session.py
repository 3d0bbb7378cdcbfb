"""A bench session: the four role objects of one bench, their clock, and the safe state.

Real benches get one pyvisa ResourceManager per session (pyvisa-py, "@py", unless the
bench file's lab.visa_library names another) and a monotonic clock; the embedded
simulated bench gets the simulator's in-process transports and its virtual clock. All
profiles are read and checked before any connection is opened, and nothing is switched on
here: opening a session only identifies the instruments and clears their status.
"""

from __future__ import annotations

import contextlib
import threading
import time
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

from benchseq.bench import Bench
from benchseq.drivers.errors import ConnectionLost, InstrumentError
from benchseq.drivers.factory import build_instrument, profile_for
from benchseq.drivers.generator import Generator
from benchseq.drivers.instrument import AMBIGUOUS, Instrument
from benchseq.drivers.load import Load
from benchseq.drivers.profile import Profile
from benchseq.drivers.scope import Scope
from benchseq.drivers.supply import Supply
from benchseq.drivers.transport import Transport

SAFE_ORDER = ("generator", "load", "supply")  # common practice: generator, then load, then supply


class MonotonicClock:
    """Real time for real benches: now() in s (monotonic), sleep(s)."""

    def now(self) -> float:
        return time.monotonic()

    def sleep(self, seconds: float) -> None:
        if seconds > 0:
            time.sleep(seconds)


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

    def safe_state(self) -> list[str]:
        """Generator off, load off, supply to its safe level (off at 0 V), in that order,
        each on a FRESH connection (an interrupted read may have left stale data on the old
        one) and verified by read-back. Never raises; returns what was done or failed."""
        steps: list[str] = []
        for role in SAFE_ORDER:
            main = self.instruments().get(role)
            if main is None:
                continue
            try:
                steps.append(self._safe_one(role, main))
            except Exception as exc:  # the safe state goes on to the next instrument regardless
                steps.append(f"{role}: FAILED to reach the safe state: {exc}")
        return steps

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
            text = _make_safe(role, fresh, self.bench)
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
        instrument.output(False)
        if instrument.output_is_on():
            raise InstrumentError(instrument.resource, "", "output still reads on")
        return "generator: output off, verified"
    if role == "load":
        instrument.input(False)
        if instrument.input_is_on():
            raise InstrumentError(instrument.resource, "", "input still reads on")
        return "load: input off, verified"
    level = bench.supply.safe_level
    instrument.set_voltage(level)
    if level == 0.0:
        instrument.output(False)
        if instrument.output_is_on():
            raise InstrumentError(instrument.resource, "", "output still reads on")
        return "supply: set to 0 V and output off, verified"
    return f"supply: set to its safe level {level:g} V, verified"


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
