"""The run through instrument faults on the simulated bench: timeouts, garbled replies,
truncated blocks, dropped connections and error-queue entries at a few percent of the
messages (sim/faults.py). The run completes, recovering or flagging, and no stored number is
silently wrong: the reference is the simulator's own truth (sim/ solves the circuit by nodal
analysis and never imports the model or the analysis it checks), and a fault-free run with
the same seed. When the faults are so frequent that the run cannot go on, it aborts with a
reason naming the instrument, reaches the safe state, keeps every point stored before and
resumes."""

from __future__ import annotations

import math
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from fakebench import Keeper

from benchseq.drivers.session import open_session
from benchseq.runner import resume_run, start_run
from benchseq.sim.faults import FaultRates
from benchseq.store import read_meta, read_results, read_truth

PLANS = Path(__file__).resolve().parent.parent / "plans"
SEEDS = (1, 3, 6)
RATE = 0.006  # per message and kind: with five kinds about 2-3 % of the messages
FAULTY = FaultRates(
    no_reply=RATE, garbage=RATE, truncated_block=RATE, disconnect=RATE, instrument_error=RATE
)
ROLES = ("generator", "supply", "scope")
POINTS = 16  # plans/demo.toml: one DC level, one ripple, 10 Hz - 1 MHz at 3 per decade
# An outlier limit in units of each point's stated standard uncertainty (k = 4: a normal
# error passes it with probability 0.99994, JCGM 100:2008 (GUM) G.1.3 and table G.1's
# normal quantiles); a number a fault made silently wrong is far outside it.
K = 4.0


def _faulty() -> dict[str, FaultRates]:
    return dict.fromkeys(ROLES, FAULTY)


def _warnings_into(found: list[str]) -> Any:
    def emit(event: Any) -> None:
        if event.kind == "warning":
            found.append(event.message)

    return emit


def _outputs(session: Any) -> list[tuple[str, bool]]:
    return [(c.role, c.value) for c in session.simulator.log if c.what == "output"]


def _ends_safe(session: Any) -> None:
    """Common practice: generator off, then load, then supply; and the
    simulator's own state says so afterwards."""
    assert _outputs(session)[-2:] == [("generator", False), ("supply", False)]
    truth = session.simulator.truth()
    assert not truth.generator_on
    assert not session.simulator.supply.settings.output


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> dict[int, dict[str, Any]]:
    """The demo plan per seed with faults, and without (the same seed's reference)."""
    found: dict[int, dict[str, Any]] = {}
    for seed in SEEDS:
        folder = tmp_path_factory.mktemp(f"faults-{seed}")
        keeper = Keeper()
        warnings: list[str] = []
        started = time.monotonic()
        outcome, path = start_run(
            str(PLANS / "demo.toml"),
            None,
            str(folder / "faulty.h5"),
            seed=seed,
            faults=_faulty(),
            session_factory=keeper,
            emit=_warnings_into(warnings),
        )
        wall = time.monotonic() - started
        clean, clean_path = start_run(
            str(PLANS / "demo.toml"), None, str(folder / "clean.h5"), seed=seed
        )
        assert clean.status == "complete"
        found[seed] = {
            "outcome": outcome,
            "path": path,
            "clean_path": clean_path,
            "session": keeper.sessions[0],
            "warnings": warnings,
            "wall_s": wall,
        }
    return found


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.slow
def test_run_completes_through_faults_with_every_point_once(
    runs: dict[int, dict[str, Any]], seed: int
) -> None:
    run = runs[seed]
    assert run["outcome"].status == "complete", run["outcome"].reason
    assert read_meta(run["path"])["status"] == "complete"
    frame = read_results(run["path"])
    assert sorted(frame["point_id"]) == list(range(POINTS))  # each exactly once
    assert sorted(read_truth(run["path"])["point_id"]) == list(range(POINTS))
    # a point measured again after a recovery says so
    retried = frame["flags"].str.split().apply(lambda f: "instrument_retry" in f)
    recoveries = sum("recovering" in w for w in run["warnings"])  # one per retry
    assert (retried.sum() > 0) == (recoveries > 0) and retried.sum() <= recoveries
    _ends_safe(run["session"])


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.slow
def test_no_stored_number_is_silently_wrong(runs: dict[int, dict[str, Any]], seed: int) -> None:
    """Against the simulator's truth: above the scope's AC-coupling corner region (≥ 200 Hz)
    and where the truth is not under the noise floor (≤ 80 dB), a value is within K = 4 of its
    stated standard uncertainties; a lower bound is at or below the truth."""
    path = runs[seed]["path"]
    frame = read_results(path).merge(read_truth(path), on="point_id", suffixes=("", "_true"))
    assert len(frame) == POINTS
    band = frame[(frame["frequency"] >= 200) & (frame["rejection_db_true"] <= 80)]
    assert len(band) >= 10
    values = band[~band["is_bound"]]
    error = (values["rejection_db"] - values["rejection_db_true"]).abs()
    assert np.all(error <= K * values["uncertainty_db"]), error.to_numpy()
    bounds = band[band["is_bound"]]
    assert np.all(bounds["bound_db"] <= bounds["rejection_db_true"])
    # the pin ripple the point was measured with is the one the simulator really had
    pin_error = np.abs(np.abs(frame["pin"]) / np.abs(frame["pin_true"]) - 1.0)
    assert np.all(pin_error[frame["frequency"] >= 200] < 0.03), pin_error.to_numpy()


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.slow
def test_every_point_agrees_with_the_fault_free_run(
    runs: dict[int, dict[str, Any]], seed: int
) -> None:
    """Every point (below 200 Hz too, where the truth comparison does not apply) agrees with
    the same seed's fault-free run within 4 combined standard uncertainties (+0.05 dB): a
    recovered fault may change the noise drawn, never the number beyond its uncertainty."""
    faulty = read_results(runs[seed]["path"]).set_index("point_id").sort_index()
    clean = read_results(runs[seed]["clean_path"]).set_index("point_id").sort_index()
    assert list(faulty.index) == list(clean.index)
    both = ~faulty["is_bound"] & ~clean["is_bound"]
    diff = (faulty["rejection_db"] - clean["rejection_db"]).abs()[both]
    allowed = 4 * np.hypot(faulty["uncertainty_db"], clean["uncertainty_db"])[both] + 0.05
    assert np.all(diff <= allowed), (diff - allowed).to_numpy()
    assert np.allclose(faulty["frequency_planned"], clean["frequency_planned"], rtol=0, atol=0)


@pytest.mark.slow
def test_faults_were_really_injected_at_a_few_percent(runs: dict[int, dict[str, Any]]) -> None:
    """The runs above met faults of several kinds at a rate of a few percent of messages."""
    injected = messages = 0
    kinds: set[str] = set()
    for run in runs.values():
        faults = run["session"].simulator.faults
        injected += sum(faults[r].injected for r in ROLES)
        messages += sum(faults[r].messages for r in ROLES)
        kinds |= {k for r in ROLES for k, n in faults[r].counts.items() if n}
        frame = read_results(run["path"])
        print(  # the figures (pytest -s): injected, messages, retried points, wall time
            f"seed {run['session'].simulator.seed}: "
            f"{sum(faults[r].injected for r in ROLES)} faults in "
            f"{sum(faults[r].messages for r in ROLES)} messages "
            f"{ {r: dict(faults[r].counts) for r in ROLES} }; resent after a passing error "
            f"{sum(i.passing_errors for i in run['session'].instruments().values())}; points "
            f"retried {int(frame['flags'].str.contains('instrument_retry').sum())}; "
            f"wall {run['wall_s']:.1f} s"
        )
    assert messages > 3000
    assert 0.01 < injected / messages < 0.05, (injected, messages)
    assert {"no_reply", "garbage", "disconnect", "instrument_error"} <= kinds
    assert injected >= 30 * len(runs)


@pytest.mark.slow
def test_faults_too_frequent_abort_safely_keep_points_and_resume(tmp_path: Path) -> None:
    """After five points the scope's link turns bad (a third of the messages lost, garbled or
    cut off): the run aborts naming the scope, goes to the safe state, every point stored
    before is intact (as reported when it was stored), and resume (link healthy again,
    the usual few percent of faults) completes the run with each point once."""
    keeper = Keeper()
    reported: dict[int, dict[str, Any]] = {}

    def emit(event: Any) -> None:
        if event.kind == "point_stored":
            reported[int(event.point_id)] = dict(event.row)
            if event.done == 5:
                simulator = keeper.sessions[-1].simulator
                simulator.faults["scope"].rates = FaultRates(
                    no_reply=0.33, garbage=0.33, disconnect=0.33
                )

    outcome, path = start_run(
        str(PLANS / "demo.toml"),
        None,
        str(tmp_path / "bad-link.h5"),
        seed=2,
        session_factory=keeper,
        emit=emit,
    )
    assert outcome.status == "aborted"
    assert "SIM::scope" in outcome.reason
    assert all("verified" in step for step in outcome.safe_state), outcome.safe_state
    _ends_safe(keeper.sessions[0])
    meta = read_meta(path)
    assert meta["status"] == "aborted" and "SIM::scope" in meta["reason"]
    stored = read_results(path).set_index("point_id").sort_index()
    assert list(stored.index) == list(range(5)) == sorted(reported)
    for pid, row in reported.items():
        for name in ("rejection_db", "uncertainty_db", "generator_pp", "frequency"):
            assert stored.loc[pid, name] == pytest.approx(row[name], rel=0, abs=0) or (
                math.isnan(row[name]) and math.isnan(stored.loc[pid, name])
            )
        assert stored.loc[pid, "pin"] == row["pin"]

    again, _ = resume_run(str(path), faults=_faulty())
    assert again is not None and again.status == "complete" and again.skipped == 5
    final = read_results(path).set_index("point_id").sort_index()
    assert list(final.index) == list(range(POINTS))
    np.testing.assert_array_equal(
        final.loc[range(5), "rejection_db"].to_numpy(), stored["rejection_db"].to_numpy()
    )
    truth = read_truth(path).set_index("point_id").sort_index()
    band = final[(final["frequency"] >= 200) & ~final["is_bound"]]
    error = (band["rejection_db"] - truth.loc[band.index, "rejection_db"]).abs()
    assert np.all(error <= K * band["uncertainty_db"])


class FailOnce:
    """Wraps one method of an opened session (or of one of its instruments): the first call
    after ``arm()`` raises ConnectionLost (a fault past the drivers' own retries); every
    other call goes through."""

    def __init__(self, role: str, method: str, armed: bool = False) -> None:
        self.role, self.method, self.armed = role, method, armed
        self.failed = 0
        self.sessions: list[Any] = []

    def arm(self) -> None:
        self.armed = True

    def __call__(self, bench: Any, seed: int = 0, faults: Any = None) -> Any:
        from benchseq.drivers.errors import ConnectionLost

        session = open_session(bench, seed=seed, faults=faults)
        self.sessions.append(session)
        owner = session if self.role == "session" else getattr(session, self.role)
        real = getattr(owner, self.method)

        def failing(*args: Any, **kwargs: Any) -> Any:
            if self.armed:
                self.armed = False
                self.failed += 1
                raise ConnectionLost(f"SIM::{self.role}", self.method, "test: lost once")
            return real(*args, **kwargs)

        setattr(owner, self.method, failing)
        return session


def _small_plan(folder: Path) -> Path:
    text = (PLANS / "demo.toml").read_text(encoding="utf-8")
    old = 'frequency = { from = "10 Hz", to = "1 MHz", per_decade = 3 }'
    assert old in text
    path = folder / "two.toml"
    path.write_text(text.replace(old, 'frequency = ["1 kHz", "10 kHz"]'), encoding="utf-8")
    return path


def _arm_after_first_point(factory: FailOnce) -> Any:
    def emit(event: Any) -> None:
        if event.kind == "point_stored" and event.done == 1:
            factory.arm()

    return emit


def test_a_fault_in_a_point_is_recovered_and_flagged(tmp_path: Path) -> None:
    """A fault that escapes the drivers in point 1 (its first generator frequency setting):
    the bench is recovered, the point measured again and flagged instrument_retry; point 0
    is not flagged, and both agree with the truth."""
    factory = FailOnce("generator", "set_frequency")
    outcome, path = start_run(
        str(_small_plan(tmp_path)), None, str(tmp_path / "once.h5"), seed=1,
        session_factory=factory, emit=_arm_after_first_point(factory),
    )  # fmt: skip
    assert outcome.status == "complete" and factory.failed == 1
    frame = read_results(path).merge(read_truth(path), on="point_id", suffixes=("", "_true"))
    flagged = {int(r.point_id): "instrument_retry" in r.flags.split() for r in frame.itertuples()}
    assert flagged == {0: False, 1: True}
    error = (frame["rejection_db"] - frame["rejection_db_true"]).abs()
    assert np.all(error <= K * frame["uncertainty_db"])
    _ends_safe(factory.sessions[0])


def test_a_fault_during_power_up_is_recovered_like_one_during_a_point(tmp_path: Path) -> None:
    """The same kind of fault during power-up (the supply's over-voltage setting): the bench
    is recovered and the power-up done again, as a point is measured again; the run then
    completes (a passing fault must not cost the whole run before its first point)."""
    factory = FailOnce("supply", "set_overvoltage_protection", armed=True)
    outcome, path = start_run(
        str(_small_plan(tmp_path)), None, str(tmp_path / "power-up.h5"), seed=1,
        session_factory=factory,
    )  # fmt: skip
    assert factory.failed == 1
    assert outcome.status == "complete", outcome.reason
    assert sorted(read_results(path)["point_id"]) == [0, 1]
    _ends_safe(factory.sessions[0])


def test_a_fault_during_the_recovery_counts_as_one_more_attempt(tmp_path: Path) -> None:
    """A point's fault, then the recovery after it meets a passing fault too (its first
    session.recover() loses a connection): that is one more of the point's attempts
    (MAX_POINT_RETRIES), not the end of the run."""
    point = FailOnce("generator", "set_frequency")
    recovery = {"failed": 0}

    def factory(bench: Any, seed: int = 0, faults: Any = None) -> Any:
        session = point(bench, seed=seed, faults=faults)
        real = session.recover

        def recover() -> None:
            if recovery["failed"] == 0:
                recovery["failed"] += 1
                from benchseq.drivers.errors import ConnectionLost

                raise ConnectionLost("SIM::scope", "recover", "test: lost during recovery")
            real()

        session.recover = recover
        return session

    outcome, path = start_run(
        str(_small_plan(tmp_path)), None, str(tmp_path / "recovery.h5"), seed=1,
        session_factory=factory, emit=_arm_after_first_point(point),
    )  # fmt: skip
    assert point.failed == 1 and recovery["failed"] == 1
    assert outcome.status == "complete", outcome.reason
    frame = read_results(path)
    assert "instrument_retry" in frame.set_index("point_id").loc[1, "flags"].split()
    _ends_safe(point.sessions[0])
