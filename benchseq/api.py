"""benchseq from Python (a notebook, a script): load the two files, check, run, read.

    import benchseq
    plan = benchseq.load_plan("plans/demo.toml")
    print(benchseq.check_plan(plan).point_count)
    result = benchseq.run(plan, out="results/demo.h5", force=True)
    points = benchseq.read_results(result.path)     # a pandas DataFrame, one row per point
    ds = benchseq.read_results(result.path, as_xarray=True)  # or an xarray.Dataset (optional)

Every function takes a file path or an object already loaded; ``bench=None`` is the embedded
simulated bench. Errors are the command line's: ``BadInput`` (a file or an option),
``MeasurementFailure`` (the bench); both are ``BenchseqError``. Nothing here prints.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal, overload

from benchseq.bench import Bench, load_bench
from benchseq.plan import Plan, load_plan
from benchseq.results import read_meta, read_truth, read_waveforms
from benchseq.results import read_results as _read_frame

if TYPE_CHECKING:
    import pandas
    import xarray

__all__ = [
    "RunResult",
    "check_plan",
    "load_bench",
    "load_plan",
    "read_meta",
    "read_results",
    "read_truth",
    "read_waveforms",
    "resume",
    "run",
    "to_xarray",
]


@dataclass(frozen=True)
class RunResult:
    """How a run ended (``outcome``: status, reason, counts, safe-state steps) and its file."""

    outcome: Any
    path: Path

    @property
    def status(self) -> str:
        return str(self.outcome.status)


@overload
def read_results(path: str | Path, *, as_xarray: Literal[False] = False) -> pandas.DataFrame: ...
@overload
def read_results(path: str | Path, *, as_xarray: Literal[True]) -> xarray.Dataset: ...
def read_results(path: str | Path, *, as_xarray: bool = False) -> Any:
    """The table of points of result file ``path``, partial runs too: a pandas DataFrame (one
    row per point, ``attrs["units"]`` the units by column) or, with ``as_xarray``, an
    ``xarray.Dataset`` indexed by point_id (see ``to_xarray``; needs the optional xarray)."""
    if as_xarray:
        return to_xarray(path)
    return _read_frame(path)


def to_xarray(source: Any, meta: dict[str, Any] | None = None) -> xarray.Dataset:
    """The points of a result file (or of a frame from ``read_results``/``read_truth``) as an
    ``xarray.Dataset`` indexed by point_id: frequencies and operating point (dc_level,
    load_current) as coordinates, ``units`` on every variable, the run's metadata in attrs.
    ModuleNotFoundError saying how to install it when xarray is missing."""
    from benchseq.xarray_export import to_xarray as export

    return export(source, meta)


def _plan(plan: Plan | str | Path) -> Plan:
    return plan if isinstance(plan, Plan) else load_plan(str(plan))


def _bench(bench: Bench | str | Path | None) -> Bench:
    return bench if isinstance(bench, Bench) else load_bench(None if bench is None else str(bench))


def check_plan(plan: Plan | str | Path, bench: Bench | str | Path | None = None) -> Any:
    """The feasibility check of every planned point (what `benchseq check` prints): a report
    with ``point_count``, ``refused_count``, ``estimated_time_s`` and ``to_dict()``."""
    from benchseq import check

    return check.check_plan(_plan(plan), _bench(bench))


def run(
    plan: Plan | str | Path,
    bench: Bench | str | Path | None = None,
    out: str | Path | None = None,
    *,
    seed: int = 0,
    keep_waveforms: bool = False,
    force: bool = False,
    on_event: Callable[[Any], None] | None = None,
) -> RunResult:
    """Run the sweep as `benchseq run` does (limits first, safe state on every ending) and
    return how it ended with the result file's path. ``on_event`` receives progress events
    (``kind``, ``message``, ``done``, ``total``, ``row``). Signals are not intercepted here:
    a KeyboardInterrupt still ends in the safe state."""
    from benchseq.runner import default_output, run_prepared

    loaded = _plan(plan)
    path = Path(out) if out is not None else default_output(loaded)
    outcome, written = run_prepared(
        loaded,
        _bench(bench),
        path,
        force=force,
        keep_waveforms=keep_waveforms,
        seed=seed,
        emit=on_event,
    )
    return RunResult(outcome, written)


def resume(path: str | Path, *, on_event: Callable[[Any], None] | None = None) -> RunResult:
    """Continue an interrupted run from the plan and bench stored in its file."""
    from benchseq.runner import resume_run

    outcome, written = resume_run(str(path), emit=on_event)
    return RunResult(outcome, written)
