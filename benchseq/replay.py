"""Replay a stored run on the simulated bench: would a plan resolve the bounds, how long
would it take, does the simulated bench reproduce the stored curve?

``replay`` re-runs the stored plan (or a new one) on a simulated bench built from the
stored bench (same injector values, generator, pin load and scope setup) into a new
result file, and compares the replayed points with the stored ones.

The simulated bench's instrument truths (scope imperfections and noise, supply, generator,
injector as built) are the stored run's scenario when the stored bench was simulated.
A stored REAL bench becomes a simulated one with ``truth_scenario``'s instrument truths
(default "demo") and the injector exactly as the bench file states (the scenario's own
"as built" injector values belong to its own board and are dropped); instrument faults
are never injected in a replay.

The device is either ``"learned"`` (benchseq.sim.learned: the stored response itself,
measured through a scope without channel mismatch because the stored ratios already hold
the measuring bench's) or the device of a named scenario (sim/scenarios/<name>.toml),
measured through the scenario's own imperfect scope.

Comparison: replayed points are matched to stored ones by planned frequency and operating
point (DC level, load current); a frequency the stored run did not measure is compared with
the learned curve there ("interpolated", its uncertainty the larger of the two neighbouring
points'); outside the stored span nothing is compared. ``within`` is |difference| ≤ k·u_c
with u_c = √(u_stored² + u_replay²) (GUM, JCGM 100:2008 §5.1.2, independent estimates) and
k = COVERAGE_K = 3: a sweep compares many points at once, and with k = 2 one agreeing point
in twenty would be called a disagreement (about every other 16-point sweep would show
one); k = 3 leaves 0.27 % per point for a normal difference. A point whose stored result is
a bound is never a reproduced value: the comparison says whether the replay resolved it.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from benchseq.bench import Bench, InstrumentSpec, parse_bench
from benchseq.errors import BadInput
from benchseq.plan import Plan, load_plan, parse_plan
from benchseq.records import SHOWN_COVERAGE_FACTOR
from benchseq.sequencer import EventSink, RunOutcome
from benchseq.stopping import StopControl
from benchseq.tomlfile import parse_toml_text

COVERAGE_K = 3.0
DEFAULT_TRUTH_SCENARIO = "demo"


@dataclass
class StoredRun:
    """A result file read back: its metadata, points, plan and bench."""

    path: Path
    meta: dict[str, Any]
    points: pd.DataFrame
    plan: Plan
    bench: Bench


def read_stored(result: str | Path) -> StoredRun:
    """Read a result file, its stored plan and bench (BadInput naming the file otherwise)."""
    from benchseq.store import read_meta, read_results

    path = Path(result)
    if path.is_dir():
        raise BadInput(f"{path} is a folder; give a result file (.h5)")
    if not path.exists() and not Path(str(path) + ".journal").exists():
        raise BadInput(f"{path}: no such result file")
    meta = read_meta(path)
    points = read_results(path)
    for key in ("plan_text", "bench_text", "plan_source", "bench_source"):
        if not meta.get(key):
            raise BadInput(f"{path}: the result does not hold its {key.replace('_', ' ')}")
    if points.empty:
        raise BadInput(f"{path}: no stored points")
    text, data = parse_toml_text(meta["plan_text"], f"{path} (stored plan)")
    plan = parse_plan(data, meta["plan_source"], text)
    btext, bdata = parse_toml_text(meta["bench_text"], f"{path} (stored bench)")
    bench = parse_bench(bdata, meta["bench_source"], btext)
    return StoredRun(path, meta, points, plan, bench)


# -- the simulated bench of a replay -------------------------------------------------------
def simulated_copy(bench: Bench, scenario: str) -> Bench:
    """``bench`` as a simulated bench: same injector, generator, pin load and scope setup;
    each role on the simulator's instrument with the shipped generic profile."""
    instruments = {
        role: InstrumentSpec(role, f"SIM::{role}", f"scpi-{role}", None, spec.channel, 5.0)
        for role, spec in bench.instruments.items()
    }
    return dataclasses.replace(
        bench,
        instruments=instruments,
        simulation=scenario,
        visa_library="@py",
        source=f"{bench.source} (simulated as sim:{scenario})",
    )


def _truth_and_bench(stored: StoredRun, truth_scenario: str) -> tuple[Any, Bench, bool, str]:
    """(base scenario, simulated bench, stored bench was real, scenario name)."""
    from benchseq.sim.scenario import load_scenario

    bench = stored.bench
    previous = stored.meta.get("replay_of") or {}
    real = bench.simulation is None and not stored.meta.get("simulated")
    real = real or previous.get("stored_bench") == "real"
    if bench.simulation is not None:
        name = bench.simulation
    elif stored.meta.get("simulated") and stored.meta.get("simulation"):
        name = str(stored.meta["simulation"])  # a replay's own file: its bench was converted
    else:
        name = truth_scenario
    base = load_scenario(name)
    if real:
        base = dataclasses.replace(
            base,
            circuit_overrides={},
            generator=dataclasses.replace(base.generator, source_resistance=None),
        )
    if bench.simulation is None:
        bench = simulated_copy(bench, name)
    return dataclasses.replace(base, faults={}), bench, real, name


def _learned(stored: StoredRun, base: Any, bench: Bench) -> Any:
    from benchseq.sim.learned import learn_device

    try:
        return learn_device(
            stored.points,
            standin=base.device,
            scope=base.scope,
            output_probe=bench.scope.output.probe,
            bandwidth_limit=bench.scope.bandwidth_limit,
            source=str(stored.path),
            output_ac_corner=_output_corner(stored, bench),
        )
    except ValueError as exc:
        raise BadInput(f"{stored.path}: cannot learn the device: {exc}") from None


def _output_corner(stored: StoredRun, bench: Bench) -> float:
    """The AC-coupling corner the run referred its output readings through (0: none)."""
    corner = stored.meta.get("scope_ac_corner_hz", 0.0)
    if bench.scope.output.coupling != "AC" or not isinstance(corner, int | float):
        return 0.0
    return float(corner) if math.isfinite(corner) and corner > 0 else 0.0


def _scenario_for(device: str, base: Any, learned: Any) -> Any:
    from benchseq.sim.scenario import load_scenario

    if device == "learned":
        clean_scope = dataclasses.replace(
            base.scope, gain_error={}, phase_error_deg={}, skew={}, probe_attenuation={}
        )
        return dataclasses.replace(base, device=learned, scope=clean_scope)
    from benchseq.errors import FileKeyError

    try:
        other = load_scenario(device)
    except FileKeyError as exc:
        raise BadInput(
            f'--device "{device}" is neither "learned" nor a scenario: {exc.problem}'
        ) from None
    return dataclasses.replace(base, device=other.device)


def session_factory_for(scenario: Any, keep: list[Any] | None = None) -> Any:
    """A runner session factory over a SimulatedBench of ``scenario`` (a Scenario object)."""

    def factory(bench: Bench, seed: int = 0, faults: Any = None) -> Any:
        from benchseq.drivers.session import assemble_session
        from benchseq.sim.world import SimulatedBench

        simulator = SimulatedBench(bench, scenario, seed=seed, faults=faults)
        if keep is not None:
            keep.append(simulator)
        return assemble_session(bench, simulator.transport, simulator.clock, simulator=simulator)

    return factory


# -- the outcome ---------------------------------------------------------------------------
@dataclass
class ReplayOutcome:
    run: RunOutcome
    path: Path
    comparison: pd.DataFrame
    device: str  # "learned" or a scenario name
    replay_of: dict[str, Any]
    coverage_k: float
    planned_bench_time_s: float  # the feasibility check's estimate for the replayed plan
    simulated_bench_time_s: float  # what the replay took on the simulated bench
    stored_planned_bench_time_s: float
    stored_bench_time_s: float  # sum of the stored points' bench time
    replay_points_bench_time_s: float  # sum of the replayed points' bench time
    summary: dict[str, Any]
    notes: list[str] = field(default_factory=list)
    model: Any = None  # the device object the replay measured
    simulators: list[Any] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able figures (for ``--json``)."""
        return {
            "file": str(self.path),
            "status": self.run.status,
            "reason": self.run.reason,
            "device": self.device,
            "replay_of": self.replay_of,
            "coverage_k": self.coverage_k,
            "planned_bench_time_s": self.planned_bench_time_s,
            "simulated_bench_time_s": self.simulated_bench_time_s,
            "replay_points_bench_time_s": self.replay_points_bench_time_s,
            "stored_planned_bench_time_s": self.stored_planned_bench_time_s,
            "stored_bench_time_s": self.stored_bench_time_s,
            "summary": _plain(self.summary),
            "notes": list(self.notes),
            "points": records(self.comparison),
        }


def _plain(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if value is pd.NA or (isinstance(value, float) and not math.isfinite(value)):
        return None
    if isinstance(value, np.generic):
        return _plain(value.item())
    return value


def records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """A comparison table as JSON-able rows (NaN and missing values become None)."""
    return [_plain(row) for row in frame.to_dict(orient="records")]


def default_replay_output(path: Path, device: str) -> Path:
    return path.with_name(f"{path.stem}-replay-{device}.h5")


def replay(
    result: str | Path,
    plan_path: str | Path | None = None,
    device: str = "learned",
    out: str | Path | None = None,
    seed: int = 0,
    emit: EventSink | None = None,
    stop: StopControl | None = None,
    *,
    force: bool = False,
    keep_waveforms: bool = False,
    truth_scenario: str = DEFAULT_TRUTH_SCENARIO,
) -> ReplayOutcome:
    """Replay stored run ``result`` (its plan, or ``plan_path``) on a simulated bench with
    ``device`` ("learned" or a scenario name) into a new result file, and compare."""
    from benchseq.runner import preflight_simulation, run_prepared
    from benchseq.store import read_meta, read_results, read_truth

    stored = read_stored(result)
    plan = load_plan(plan_path) if plan_path is not None else stored.plan
    if not device:
        raise BadInput('--device needs "learned" or a scenario name')
    base, bench, real, scenario_name = _truth_and_bench(stored, truth_scenario)
    learned = _learned(stored, base, bench)
    scenario = _scenario_for(device, base, learned)
    preflight_simulation(plan, bench, scenario)  # a netlist device: solved before any file
    path = Path(out) if out is not None else default_replay_output(stored.path, device)
    replay_of = {
        "file": str(stored.path),
        "run_id": stored.meta.get("run_id", ""),
        "plan_sha256": stored.meta.get("plan_sha256", ""),
        "device": device,
        "plan_changed": plan.text_hash != stored.meta.get("plan_sha256"),
        "instrument_truths": scenario_name,
        "stored_bench": "real" if real else "simulated",
        "bound_margin_db": learned.margin_db,
    }
    simulators: list[Any] = []
    run, path = run_prepared(
        plan,
        bench,
        path,
        meta_extra={"replay_of": replay_of},
        force=force,
        keep_waveforms=keep_waveforms,
        seed=seed,
        emit=emit,
        stop=stop,
        session_factory=session_factory_for(scenario, simulators),
    )
    replayed = read_results(path)
    truth = read_truth(path)
    comparison = compare_points(stored.points, replayed, truth, learned)
    notes = _notes(stored, real, scenario_name, device, learned, comparison)
    replay_meta = read_meta(path)
    return ReplayOutcome(
        run=run,
        path=path,
        comparison=comparison,
        device=device,
        replay_of=replay_of,
        coverage_k=COVERAGE_K,
        planned_bench_time_s=float(replay_meta.get("planned_bench_time_s", math.nan)),
        simulated_bench_time_s=float(run.bench_time),
        stored_planned_bench_time_s=float(stored.meta.get("planned_bench_time_s", math.nan)),
        stored_bench_time_s=float(np.nansum(stored.points["bench_time"].to_numpy())),
        replay_points_bench_time_s=float(np.nansum(replayed["bench_time"].to_numpy())),
        summary=summarise(comparison),
        notes=notes,
        model=scenario.device,
        simulators=simulators,
    )


def _notes(
    stored: StoredRun,
    real: bool,
    scenario_name: str,
    device: str,
    learned: Any,
    comparison: pd.DataFrame,
) -> list[str]:
    notes = []
    if real:
        notes.append(
            f"the stored bench is a real one: simulated with the instrument truths of scenario "
            f'"{scenario_name}" and the injector as its bench file states'
        )
    if device == "learned":
        notes.append(
            "device learned from the stored points (PCHIP on log f: log|H|, unwrapped phase; "
            f"ends held); bounds entered at bound + {learned.margin_db:g} dB"
        )
        if learned.clamped_noise:
            notes.append(
                f"{learned.clamped_noise} stored floor(s) were below the simulated scope's own "
                "noise: the replay's floor is higher there"
            )
    nearest = int((comparison["op_match"] == "nearest").sum()) if len(comparison) else 0
    if nearest:
        notes.append(
            f"{nearest} replayed point(s) have no stored operating point: the nearest stored "
            "one was used (not compared)"
        )
    outside = int((comparison["match"] == "outside_span").sum()) if len(comparison) else 0
    if outside:
        notes.append(
            f"{outside} replayed point(s) lie outside the stored frequency span: the end "
            "values were held (not compared)"
        )
    return notes


# -- comparison ----------------------------------------------------------------------------
def _same_value(a: np.ndarray, b: float) -> np.ndarray:
    if math.isnan(b):
        return np.isnan(a)
    return np.abs(a - b) <= 1e-9 * max(abs(b), 1e-12)


def compare_points(
    stored: pd.DataFrame,
    replayed: pd.DataFrame,
    truth: pd.DataFrame | None,
    reference: Any,
    k: float = COVERAGE_K,
) -> pd.DataFrame:
    """One row per replayed point: the stored value or bound it is compared with (same
    frequency and operating point, else the learned curve ``reference`` interpolated),
    the replayed value or bound, difference, combined uncertainty and verdicts."""
    s_f = stored["frequency_planned"].to_numpy(float)
    s_dc = stored["dc_level"].to_numpy(float)
    s_load = stored["load_current"].to_numpy(float)
    s_ripple = stored["ripple_target"].to_numpy(float)
    truth_db: dict[int, float] = {}
    if truth is not None and "rejection_db" in truth:
        truth_db = dict(
            zip(truth["point_id"].astype(int), truth["rejection_db"].astype(float), strict=True)
        )
    rows = []
    for r in replayed.to_dict(orient="records"):
        f, dc, load = float(r["frequency_planned"]), float(r["dc_level"]), float(r["load_current"])
        curve, op_exact = reference.match_setpoint(dc, load)
        row: dict[str, Any] = {
            "point_id": int(r["point_id"]),
            "frequency": f,
            "dc_level": dc,
            "load_current": load,
            "ripple_target": float(r["ripple_target"]),
            "match": "same",
            "op_match": "same" if op_exact else "nearest",
            "stored_point_id": pd.NA,
            "stored_db": math.nan,
            "stored_u_db": math.nan,
            "stored_bound_db": math.nan,
            "reference_from_bound": False,
        }
        # stored points at the operating point compared with (the nearest one if need be)
        hits = np.flatnonzero(
            _same_value(s_dc, curve.dc_level)
            & _same_value(s_load, curve.load_current)
            & (np.abs(s_f - f) <= 1e-6 * f)
        )
        if hits.size:
            ripple_hits = hits[
                np.abs(s_ripple[hits] - row["ripple_target"]) <= 1e-6 * s_ripple[hits]
            ]
            s = stored.iloc[int(ripple_hits[0] if ripple_hits.size else hits[0])]
            row["stored_point_id"] = int(s["point_id"])
            if bool(s["is_bound"]):
                row["stored_bound_db"] = float(s["bound_db"])
                row["reference_from_bound"] = True
            else:
                row["stored_db"] = float(s["rejection_db"])
                row["stored_u_db"] = float(s["uncertainty_db"])
        else:
            low, high = curve.span
            if f < low * (1 - 1e-9) or f > high * (1 + 1e-9):
                row["match"] = "outside_span"
            else:
                row["match"] = "interpolated"
            i, j = curve.neighbours(f)
            learned_db = float(curve.rejection_db(np.array([f]))[0])
            if curve.from_bound[i] or curve.from_bound[j]:
                row["reference_from_bound"] = True
                row["stored_bound_db"] = learned_db - reference.margin_db
            else:
                row["stored_db"] = learned_db
                row["stored_u_db"] = float(max(curve.uncertainty_db[i], curve.uncertainty_db[j]))
        replay_bound = bool(r["is_bound"])
        row["replay_db"] = math.nan if replay_bound else float(r["rejection_db"])
        row["replay_u_db"] = math.nan if replay_bound else float(r["uncertainty_db"])
        row["replay_bound_db"] = float(r["bound_db"]) if replay_bound else math.nan
        row["replay_is_bound"] = replay_bound
        both = math.isfinite(row["stored_db"]) and math.isfinite(row["replay_db"])
        difference = row["replay_db"] - row["stored_db"] if both else math.nan
        combined = math.hypot(row["stored_u_db"], row["replay_u_db"]) if both else math.nan
        row["difference_db"] = difference
        row["combined_u_db"] = combined
        row["z"] = difference / combined if both and combined > 0 else math.nan
        comparable = (
            both
            and row["match"] in ("same", "interpolated")
            and row["op_match"] == "same"
            and not row["reference_from_bound"]
        )
        row["compared"] = comparable
        row["within"] = bool(abs(difference) <= k * combined) if comparable else pd.NA
        row["resolved_now"] = (not replay_bound) if row["reference_from_bound"] else pd.NA
        t = truth_db.get(row["point_id"], math.nan)
        row["truth_db"] = t
        row["truth_difference_db"] = row["replay_db"] - t if math.isfinite(t) else math.nan
        row["verdict"] = _verdict(row, k)
        rows.append(row)
    frame = pd.DataFrame(rows, columns=COMPARISON_COLUMNS)
    for name in ("within", "resolved_now"):
        frame[name] = frame[name].astype("boolean")
    frame["stored_point_id"] = frame["stored_point_id"].astype("Int64")
    frame.attrs["coverage_k"] = k
    return frame


COMPARISON_COLUMNS = (
    "point_id",
    "frequency",
    "dc_level",
    "load_current",
    "ripple_target",
    "match",
    "op_match",
    "stored_point_id",
    "stored_db",
    "stored_u_db",
    "stored_bound_db",
    "reference_from_bound",
    "replay_db",
    "replay_u_db",
    "replay_bound_db",
    "replay_is_bound",
    "difference_db",
    "combined_u_db",
    "z",
    "compared",
    "within",
    "resolved_now",
    "truth_db",
    "truth_difference_db",
    "verdict",
)


def _verdict(row: dict[str, Any], k: float) -> str:
    where = " (interpolated)" if row["match"] == "interpolated" else ""
    if row["match"] == "outside_span":
        return "not compared: outside the stored span"
    if row["op_match"] == "nearest":
        return "not compared: operating point not stored"
    if row["reference_from_bound"]:
        if row["replay_is_bound"]:
            return f"still a bound{where}"
        return f"resolved now{where}"
    if row["replay_is_bound"]:
        consistent = row["replay_bound_db"] <= row["stored_db"] + k * row["stored_u_db"]
        return f"bound in replay{where}" + ("" if consistent else ", above the stored value")
    return ("reproduced" if row["within"] else "differs") + where


def summarise(comparison: pd.DataFrame) -> dict[str, Any]:
    """Counts and the largest |difference| / u_c over the compared points."""
    compared = comparison[comparison["compared"].astype(bool)] if len(comparison) else comparison
    z = compared["z"].abs().to_numpy(float) if len(compared) else np.zeros(0)
    bounds = (
        comparison[comparison["reference_from_bound"].astype(bool)]
        if len(comparison)
        else comparison
    )
    resolved = int(bounds["resolved_now"].fillna(False).astype(bool).sum()) if len(bounds) else 0
    stored_values = comparison[
        ~comparison["reference_from_bound"].astype(bool) & comparison["stored_db"].notna()
    ]
    return {
        "points": len(comparison),
        "compared": len(compared),
        "within": int(compared["within"].fillna(False).astype(bool).sum()) if len(compared) else 0,
        "max_abs_z": float(np.max(z)) if z.size else math.nan,
        "median_abs_z": float(np.median(z)) if z.size else math.nan,
        "stored_bounds": len(bounds),
        "resolved_now": resolved,
        "still_bound": len(bounds) - resolved,
        "bounds_on_stored_values": int(stored_values["replay_is_bound"].astype(bool).sum()),
        "interpolated": int((comparison["match"] == "interpolated").sum())
        if len(comparison)
        else 0,
        "not_compared_op": int((comparison["op_match"] == "nearest").sum())
        if len(comparison)
        else 0,
        "outside_span": int((comparison["match"] == "outside_span").sum())
        if len(comparison)
        else 0,
    }


# -- rendering -----------------------------------------------------------------------------
def _db(value: float, u: float = math.nan) -> str:
    """'62.31 ± 0.20 dB': the value with its expanded uncertainty U = k·u (k = 2)."""
    if not math.isfinite(value):
        return ""
    big_u = SHOWN_COVERAGE_FACTOR * u
    return f"{value:.2f} ± {big_u:.2f} dB" if math.isfinite(u) else f"{value:.2f} dB"


def _side(value: float, u: float, bound: float, is_bound: bool) -> str:
    if is_bound or (not math.isfinite(value) and math.isfinite(bound)):
        return f"≥ {bound:.1f} dB" if math.isfinite(bound) else "bound"
    return _db(value, u)


def _op_text(dc: float, load: float) -> str:
    from benchseq.units import format_si

    text = format_si(dc, "V", 3)
    return text if math.isnan(load) else f"{text}, {format_si(load, 'A', 3)}"


def render_comparison(outcome: ReplayOutcome) -> Any:
    """The replay's answers and its point-by-point comparison (a rich renderable)."""
    from rich.console import Group
    from rich.markup import escape
    from rich.table import Table
    from rich.text import Text

    from benchseq.display import duration_text
    from benchseq.units import format_si

    s = outcome.summary
    k = outcome.coverage_k
    of = outcome.replay_of
    plan_word = "a new plan" if of.get("plan_changed") else "the stored plan"
    head = [
        f"[bold]replay[/] of {escape(str(of['file']))} (run {escape(str(of['run_id'])[:8])}) "
        f"with {plan_word} on device [bold]{escape(outcome.device)}[/]: run "
        f"{escape(outcome.run.status)} ({escape(outcome.run.reason)})",
        f"bench time: planned {duration_text(outcome.planned_bench_time_s)} "
        f"(stored run planned {duration_text(outcome.stored_planned_bench_time_s)}); "
        f"simulated {duration_text(outcome.simulated_bench_time_s)} in all, points "
        f"{duration_text(outcome.replay_points_bench_time_s)} "
        f"(the stored points took {duration_text(outcome.stored_bench_time_s)})",
    ]
    if s["compared"]:
        head.append(
            f"agreement: {s['within']} of {s['compared']} compared points within k·u_c (k = {k:g}); "
            f"largest |difference|/u_c {s['max_abs_z']:.2f}, median {s['median_abs_z']:.2f}"
        )
    else:
        head.append("agreement: no point could be compared value with value")
    if s["stored_bounds"]:
        head.append(
            f"stored lower bounds: {s['resolved_now']} resolved by the replay, "
            f"{s['still_bound']} still bounds (a resolved bound is not a reproduced value)"
        )
    if s["bounds_on_stored_values"]:
        head.append(f"{s['bounds_on_stored_values']} stored value(s) ended as bounds in the replay")
    head.extend(f"note: {escape(n)}" for n in outcome.notes)

    table = Table(title="stored vs replayed", title_justify="left")
    for name, justify in (
        ("#", "right"),
        ("frequency", "right"),
        ("operating point", "right"),
        (f"stored (± U, k = {SHOWN_COVERAGE_FACTOR:g})", "right"),
        (f"replayed (± U, k = {SHOWN_COVERAGE_FACTOR:g})", "right"),
        ("difference", "right"),
        (f"k·u_c (k={k:g})", "right"),
        ("verdict", "left"),
    ):
        table.add_column(name, justify=justify)  # type: ignore[arg-type]
    for r in outcome.comparison.to_dict(orient="records"):
        stored_text = _side(
            r["stored_db"], r["stored_u_db"], r["stored_bound_db"], r["reference_from_bound"]
        )
        replay_text = _side(
            r["replay_db"], r["replay_u_db"], r["replay_bound_db"], r["replay_is_bound"]
        )
        verdict = r["verdict"]
        style = (
            "green"
            if verdict.startswith(("reproduced", "resolved"))
            else ("red" if verdict.startswith("differs") else "yellow")
        )
        table.add_row(
            str(r["point_id"]),
            format_si(r["frequency"], "Hz", 4),
            escape(_op_text(r["dc_level"], r["load_current"])),
            escape(stored_text),
            escape(replay_text),
            f"{r['difference_db']:+.2f} dB" if math.isfinite(r["difference_db"]) else "",
            f"{k * r['combined_u_db']:.2f} dB" if math.isfinite(r["combined_u_db"]) else "",
            f"[{style}]{escape(verdict)}[/]",
        )
    return Group(*(Text.from_markup(line) for line in head), table)
