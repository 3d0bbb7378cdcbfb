"""Starting and resuming runs: files are validated, the plan checked and the result file
created before any instrument is touched; then the sequencer runs on a bench session."""

from __future__ import annotations

import dataclasses
import datetime as dt
import platform
import uuid
from pathlib import Path
from typing import Any

from benchseq import __version__
from benchseq.bench import Bench, load_bench, parse_bench
from benchseq.errors import BadInput
from benchseq.plan import Plan, load_plan, parse_plan
from benchseq.records import POINT_COLUMNS, SCHEMA_VERSION, SIGN_CONVENTION, TRUTH_COLUMNS
from benchseq.sequencer import EventSink, RunOutcome, Sequencer
from benchseq.stopping import StopControl
from benchseq.tomlfile import parse_toml_text


class RefusedPlan(BadInput):
    """The feasibility check refused points: nothing was switched on."""


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
    report = _refuse_infeasible(plan, bench)
    meta = run_meta(plan, bench, seed, keep_waveforms, report)
    meta.update(meta_extra or {})
    writer = RunWriter.create(
        path,
        meta,
        POINT_COLUMNS,
        force=force,
        truth_columns=TRUTH_COLUMNS if bench.is_simulated else None,
    )
    session = open_session(bench, seed=seed, faults=faults)
    try:
        writer.update_meta(identities=dict(session.identities))
        sequencer = Sequencer(
            plan,
            bench,
            session,
            writer,
            emit=emit,
            stop=stop,
            keep_waveforms=keep_waveforms,
            seed=seed,
            planned_bench_time=report.estimated_time_s,
        )
        return sequencer.run(), path
    finally:
        session.close()


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
    """Continue an interrupted run from the plan and bench stored in its file."""
    from benchseq.drivers.session import open_session
    from benchseq.store import RunWriter, read_meta

    open_session = session_factory or open_session

    path = Path(result_path)
    meta = read_meta(path)
    if meta.get("status") == "complete":
        return None, path
    text, data = parse_toml_text(meta["plan_text"], f"{path} (stored plan)")
    plan = parse_plan(data, meta["plan_source"], text)
    btext, bdata = parse_toml_text(meta["bench_text"], f"{path} (stored bench)")
    bench = parse_bench(bdata, meta["bench_source"], btext)
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
    report = _refuse_infeasible(plan, bench)
    writer = RunWriter.resume(path)
    seed = int(meta.get("seed", 0))
    session = open_session(bench, seed=seed, faults=faults)
    try:
        sequencer = Sequencer(
            plan,
            bench,
            session,
            writer,
            emit=emit,
            stop=stop,
            keep_waveforms=bool(meta.get("keep_waveforms", False)),
            seed=seed,
            planned_bench_time=report.estimated_time_s,
        )
        return sequencer.run(), path
    finally:
        session.close()
