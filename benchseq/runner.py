"""Starting and resuming runs: files are validated, the plan checked and the result file
created before any instrument is touched; then the sequencer runs on a bench session."""

from __future__ import annotations

import dataclasses
import datetime as dt
import logging
import platform
import uuid
import warnings
from pathlib import Path
from typing import Any

from benchseq import __version__
from benchseq.bench import Bench, load_bench, parse_bench
from benchseq.errors import BadInput, FileKeyError
from benchseq.plan import Plan, load_plan, parse_plan
from benchseq.preflight import preflight
from benchseq.records import (
    COVERAGE_NOTE,
    POINT_COLUMNS,
    SCHEMA_VERSION,
    SIGN_CONVENTION,
    STORED_COVERAGE_FACTOR,
    TRUTH_COLUMNS,
)
from benchseq.sequencer import EventSink, RunOutcome, Sequencer
from benchseq.stopping import StopControl
from benchseq.tomlfile import parse_toml_text

# the run's own lines (benchseq.runlog logs its progress there too)
log = logging.getLogger("benchseq.run")


class RefusedPlan(BadInput):
    """The feasibility check refused points: nothing was switched on."""


class _FlaggingWriter:
    """The run's writer with run-level flags added to every point's row before it is stored
    (the row is amended in place, so the sequencer's counts and events see the flags too)."""

    def __init__(self, writer: Any, flags: list[str]) -> None:
        self._writer = writer
        self._flags = list(flags)

    def append(
        self,
        point_id: int,
        row: dict[str, Any],
        truth: dict[str, Any] | None = None,
        waveforms: Any = None,
    ) -> None:
        present = str(row.get("flags", "")).split()
        row["flags"] = " ".join(dict.fromkeys([*present, *self._flags]))
        self._writer.append(point_id, row, truth=truth, waveforms=waveforms)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._writer, name)


def _bench_calibration(bench: Bench) -> Any:
    """The calibration the bench names (scope.calibration), loaded; None when it names none.
    A missing or unreadable file is BadInput naming the bench file and key."""
    if bench.scope.calibration is None:
        return None
    from benchseq.calibrate import load_calibration

    try:
        return load_calibration(bench.scope.calibration)
    except BadInput as exc:
        raise FileKeyError(
            bench.source, "scope.calibration", f"{exc}; nothing was switched on"
        ) from None


def _stored_calibration(record: dict[str, Any], result: Path) -> Any:
    """On resume: the calibration the run started with, unchanged (same sha256)."""
    from benchseq.calibrate import load_calibration

    where = f"{result}: the channel-match calibration this run started with"
    try:
        loaded = load_calibration(record["path"])
    except BadInput as exc:
        raise BadInput(f"{where} cannot be read: {exc}") from None
    if loaded.sha256 != record.get("sha256"):
        raise BadInput(
            f"{where} ({record['path']}) has changed since (sha256 differs); restore that file "
            "to resume, or start a new run"
        )
    return loaded


def _calibration_meta(loaded: Any, plan: Plan, bench: Bench, identities: Any) -> dict[str, Any]:
    """What the run records of the calibration applied (mismatches: condition differences)."""
    from benchseq.calibrate import RANGE_NOTE, condition_mismatches, uncovered_frequencies

    return {
        **loaded.record(),
        "mismatches": condition_mismatches(loaded, bench, identities),
        "uncovered_frequencies_hz": uncovered_frequencies(loaded, plan),
        "notes": [RANGE_NOTE],
    }


def _calibrated_writer(writer: Any, record: dict[str, Any] | None) -> Any:
    from benchseq.calibrate import CONDITIONS_FLAG

    if record is not None and record["mismatches"]:
        return _FlaggingWriter(writer, [CONDITIONS_FLAG])
    return writer


def _refuse_folders(path: Path) -> None:
    """A result path, or the journal beside it, that is a folder is refused by name (even
    with --force: a folder is never removed to make room for a result)."""
    from benchseq.store import journal_path

    for candidate, what in ((path, "the result file"), (journal_path(path), "its journal")):
        if candidate.is_dir():
            raise BadInput(
                f"{candidate} is a folder, so {what} cannot be written there "
                f"(--out {path}); nothing was switched on. Choose another result file name"
            )


def default_output(plan: Plan) -> Path:
    stamp = dt.datetime.now().strftime("%Y%m%d-%H%M%S")
    stem = Path(plan.source).stem or "run"
    return Path("results") / f"{stem}-{stamp}.h5"


def _refuse_infeasible(plan: Plan, bench: Bench) -> Any:
    from benchseq.check import check_plan

    report = check_plan(plan, bench)
    if report.refused_count:
        raise RefusedPlan(
            f"{report.refused_count} of {report.point_count} points are refused by the feasibility "
            f"check; nothing was switched on. Run `benchseq check {plan.source}` for the reasons."
        )
    return report


def preflight_simulation(plan: Plan, bench: Bench, scenario: Any = None) -> None:
    """Before any file is created: a simulated bench's scenario loads (a netlist device is
    checked by ngspice then) and a device that can fail at an operating point (a netlist)
    is solved at each DC level and load the plan visits. Raises BadInput or
    MeasurementFailure naming the file, the subcircuit and the point."""
    if scenario is None:
        if bench.simulation is None:
            return
        from benchseq.sim.scenario import load_scenario

        scenario = load_scenario(bench.simulation)
    preflight = getattr(scenario.device, "preflight", None)
    if preflight is None:
        return
    from benchseq.sim.devices import OperatingPoint

    loads = plan.load_currents if plan.load_currents is not None else [0.0]
    board = float(getattr(scenario.device, "board_load_current", 0.0))
    preflight(
        [OperatingPoint(float(dc), board + float(load)) for dc in plan.dc_levels for load in loads]
    )


def run_meta(
    plan: Plan, bench: Bench, seed: int, keep_waveforms: bool, report: Any
) -> dict[str, Any]:
    from benchseq.injector import InjectorModel

    corners = InjectorModel(bench.injector, bench.generator, bench.pin).corners()
    return {
        "run_id": str(uuid.uuid4()),
        "schema_version": SCHEMA_VERSION,
        "software": f"benchseq {__version__}",
        "python": platform.python_version(),
        "status": "running",
        "started": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
        "title": plan.title,
        "device": plan.device_name,
        "operator": plan.operator,
        "plan_source": plan.source,
        "plan_text": plan.text,
        "plan_sha256": plan.text_hash,
        "bench_source": bench.source,
        "bench_text": bench.text,
        "bench_sha256": bench.text_hash,
        "bench_name": bench.name,
        "simulated": bench.is_simulated,
        "simulation": bench.simulation or "",
        "seed": seed,
        "keep_waveforms": keep_waveforms,
        "point_count": report.point_count,
        "planned_bench_time_s": report.estimated_time_s,
        "sign_convention": SIGN_CONVENTION,
        "coverage_factor": STORED_COVERAGE_FACTOR,
        "coverage": COVERAGE_NOTE,
        "target_uncertainty_db": plan.capture.target_uncertainty_db,
        "frequency_tolerance": plan.capture.frequency_tolerance,
        "device_gain_db": plan.device.gain_db,
        "injector": dataclasses.asdict(bench.injector),
        "generator": dataclasses.asdict(bench.generator),
        "pin_load": dataclasses.asdict(bench.pin),
        "scope_setup": dataclasses.asdict(bench.scope),
        "usable_band_hz": list(corners.usable_band),
        "corners": {
            k: (abs(v) if isinstance(v, complex) else v)
            for k, v in dataclasses.asdict(corners).items()
            if not isinstance(v, tuple)
        },
    }


def start_run(
    plan_path: str,
    bench_path: str | None,
    out: str | None,
    *,
    force: bool = False,
    keep_waveforms: bool = False,
    seed: int = 0,
    emit: EventSink | None = None,
    stop: StopControl | None = None,
    faults: Any = None,
    session_factory: Any = None,
) -> tuple[RunOutcome, Path]:
    """Validate, check, create the result file, then open the bench and run.

    ``session_factory(bench, seed=, faults=)`` replaces benchseq.drivers.session.open_session
    (tests use it to keep hold of the simulated bench and read its log)."""
    plan = load_plan(plan_path)
    bench = load_bench(bench_path)
    return run_prepared(
        plan,
        bench,
        Path(out) if out else default_output(plan),
        force=force,
        keep_waveforms=keep_waveforms,
        seed=seed,
        emit=emit,
        stop=stop,
        faults=faults,
        session_factory=session_factory,
    )


def run_prepared(
    plan: Plan,
    bench: Bench,
    path: Path,
    *,
    meta_extra: dict[str, Any] | None = None,
    force: bool = False,
    keep_waveforms: bool = False,
    seed: int = 0,
    emit: EventSink | None = None,
    stop: StopControl | None = None,
    faults: Any = None,
    session_factory: Any = None,
) -> tuple[RunOutcome, Path]:
    """Run already-parsed ``plan`` and ``bench`` into a new result file at ``path``.

    ``meta_extra`` adds run-level metadata (a replay records what it replayed there)."""
    from benchseq.drivers.session import open_session
    from benchseq.store import RunWriter

    open_session = session_factory or open_session
    preflight(plan, bench)  # everything the run needs, before any file or instrument
    _refuse_folders(path)
    report = _refuse_infeasible(plan, bench)
    preflight_simulation(plan, bench)
    calibration = _bench_calibration(bench)
    meta = run_meta(plan, bench, seed, keep_waveforms, report)
    meta["calibration"] = (
        None if calibration is None else _calibration_meta(calibration, plan, bench, None)
    )
    meta.update(meta_extra or {})
    writer = RunWriter.create(
        path,
        meta,
        POINT_COLUMNS,
        force=force or is_pointless_abort(path),
        truth_columns=TRUTH_COLUMNS if bench.is_simulated else None,
    )
    log.info(
        "run started: %s, %d point%s, bench %s; results %s",
        plan.source,
        report.point_count,
        "" if report.point_count == 1 else "s",
        bench.name,
        path,
    )
    outcome = _run_on_bench(
        plan,
        bench,
        writer,
        open_session,
        calibration,
        report.estimated_time_s,
        seed=seed,
        faults=faults,
        emit=emit,
        stop=stop,
        keep_waveforms=keep_waveforms,
        record_identities=True,
    )
    return outcome, path


def is_pointless_abort(path: Path) -> bool:
    """True for a result file of a run that aborted before storing any point (its bench
    could not be opened, say): nothing to keep or resume, so a new run may replace it
    without --force. Any other file, or one that cannot be read, is False."""
    from benchseq.store import read_meta, read_results

    if not Path(path).is_file():
        return False
    try:
        return read_meta(path).get("status") == "aborted" and len(read_results(path)) == 0
    except Exception:  # unreadable: let the writer refuse it as any existing file
        return False


def _run_on_bench(
    plan: Plan,
    bench: Bench,
    writer: Any,
    open_session: Any,
    calibration: Any,
    planned_bench_time: float,
    *,
    seed: int,
    faults: Any,
    emit: EventSink | None,
    stop: StopControl | None,
    keep_waveforms: bool,
    record_identities: bool,
) -> RunOutcome:
    """Open the bench, note what the file must know of it, run the sequencer, close.

    The writer (and with it the result's write lock) is closed on every way out."""
    if not bench.is_simulated and emit is not None:
        from benchseq.cautions import RUN_CAUTION
        from benchseq.sequencer import Event

        emit(Event("caution", "\n".join(RUN_CAUTION)))
    try:
        return _sequence_on_bench(
            plan, bench, writer, open_session, calibration, planned_bench_time,
            seed=seed, faults=faults, emit=emit, stop=stop, keep_waveforms=keep_waveforms,
            record_identities=record_identities,
        )  # fmt: skip
    finally:
        writer.close()


def _sequence_on_bench(
    plan: Plan,
    bench: Bench,
    writer: Any,
    open_session: Any,
    calibration: Any,
    planned_bench_time: float,
    *,
    seed: int,
    faults: Any,
    emit: EventSink | None,
    stop: StopControl | None,
    keep_waveforms: bool,
    record_identities: bool,
) -> RunOutcome:
    try:
        session = open_session(bench, seed=seed, faults=faults)
    except BaseException as exc:  # the file must not go on saying "running"
        writer.finish("aborted", reason=f"the bench could not be opened: {exc}")
        raise
    try:
        if record_identities:
            writer.update_meta(identities=dict(session.identities))
        record = None
        if calibration is not None:
            record = _calibration_meta(calibration, plan, bench, session.identities)
            writer.update_meta(calibration=record)
        sequencer = Sequencer(
            plan,
            bench,
            session,
            _calibrated_writer(writer, record),
            emit=emit,
            stop=stop,
            keep_waveforms=keep_waveforms,
            seed=seed,
            planned_bench_time=planned_bench_time,
            calibration=None if calibration is None else calibration.table,
        )
        return sequencer.run()
    finally:
        session.close()


def _with_stored_scenario(bench: Bench, meta: dict[str, Any]) -> Bench:
    """A stored bench naming a scenario FILE: the file the run used (stored as an absolute
    path when it started), not the bench text's relative path read from today's folder."""
    from benchseq.bench import is_scenario_path

    stored = meta.get("simulation")
    if bench.simulation and is_scenario_path(bench.simulation) and stored:
        return dataclasses.replace(bench, simulation=str(stored))
    return bench


def resume_run(
    result_path: str,
    plan_path: str | None = None,
    bench_path: str | None = None,
    *,
    emit: EventSink | None = None,
    stop: StopControl | None = None,
    faults: Any = None,
    session_factory: Any = None,
) -> tuple[RunOutcome | None, Path]:
    """Continue an interrupted run from the plan and bench stored in its file.

    First the HDF5 file is repaired from the journal where it lags (a kill or a full disk
    during an update); a complete run then returns (None, path). Notices of what was
    repaired are issued as ``ResultWarning``. Another process writing the file: ResultBusy."""
    from benchseq.drivers.session import open_session
    from benchseq.store import ResultBusy, ResultWarning, RunWriter, read_meta, repair_mirror
    from benchseq.writelock import busy_message

    open_session = session_factory or open_session

    path = Path(result_path)
    repaired = repair_mirror(path)
    if repaired.writer_active:
        raise ResultBusy(busy_message(path))
    for notice in repaired.notices(path):
        warnings.warn(notice, ResultWarning, stacklevel=2)
    meta = read_meta(path)
    if meta.get("status") == "complete":
        return None, path
    text, data = parse_toml_text(meta["plan_text"], f"{path} (stored plan)")
    plan = parse_plan(data, meta["plan_source"], text)
    btext, bdata = parse_toml_text(meta["bench_text"], f"{path} (stored bench)")
    bench = _with_stored_scenario(parse_bench(bdata, meta["bench_source"], btext), meta)
    if plan_path is not None and load_plan(plan_path).text_hash != meta["plan_sha256"]:
        raise BadInput(
            f"{plan_path} is not the plan this run was started with ({path}); "
            "resume without --plan to use the stored plan"
        )
    if bench_path is not None and load_bench(bench_path).text_hash != meta["bench_sha256"]:
        raise BadInput(
            f"{bench_path} is not the bench this run was started with ({path}); "
            "resume without --bench to use the stored bench"
        )
    # the calibration is the run's own (below), whatever the bench file names today
    preflight(
        plan, dataclasses.replace(bench, scope=dataclasses.replace(bench.scope, calibration=None))
    )
    report = _refuse_infeasible(plan, bench)
    stored = meta.get("calibration")
    if stored:
        calibration = _stored_calibration(stored, path)
    elif "calibration" not in meta and bench.scope.calibration is not None:
        # a run recorded before calibrations were noted: the path is relative to its bench
        named = Path(bench.scope.calibration)
        if not named.is_absolute():
            named = Path(meta["bench_source"]).parent / named
        calibration = _bench_calibration(
            dataclasses.replace(
                bench, scope=dataclasses.replace(bench.scope, calibration=str(named))
            )
        )
    else:
        calibration = None
    writer = RunWriter.resume(path)
    log.info("---- run resumed: %s (%d points stored before) ----", path, len(writer.stored_ids))
    seed = int(meta.get("seed", 0))
    outcome = _run_on_bench(
        plan,
        bench,
        writer,
        open_session,
        calibration,
        report.estimated_time_s,
        seed=seed,
        faults=faults,
        emit=emit,
        stop=stop,
        keep_waveforms=bool(meta.get("keep_waveforms", False)),
        record_identities=False,
    )
    return outcome, path
