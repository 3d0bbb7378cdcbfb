"""The `check` and `injector` reports: a plan's feasibility and bench time, the injector's response.

``check_plan(plan, bench)`` expands the plan, runs the injector model's feasibility check on
every point (and on the linearity repeats), estimates the bench time and groups the
verdicts by reason. ``injector_report(bench, ripple)`` tabulates the injector at spot
frequencies. Both give plain data with ``to_dict()``; ``render_check`` / ``render_injector``
build rich renderables for the CLI, ``plot_injector`` writes a Bode-style PNG.
"""

from __future__ import annotations

import contextlib
import math
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from benchseq.bench import Bench, describe_band
from benchseq.distinct import first_of, numbered, pairs
from benchseq.errors import BadInput, BenchseqError, FileKeyError
from benchseq.injector import (
    REASON_BIT,
    REASON_TITLES,
    REASONS,
    Corners,
    DeviceLimitsLike,
    Feasibility,
    InjectorModel,
    InjectorValuesError,
)
from benchseq.preflight import plan_bench_warnings
from benchseq.settling import Settling
from benchseq.units import Amplitude, format_si

if TYPE_CHECKING:
    from benchseq.plan import Plan

SPOT_FREQUENCIES = (10.0, 100.0, 1e3, 10e3, 100e3, 1e6, 10e6)  # Hz
LOW_PHASE_MARGIN_DEG = 45.0
PEAKING_WARN_DB = 1.0
WORST_LISTED = 10
PHASE_FROM_HZ = 1.0  # the injector's phase is unwrapped upwards from here (table and plot)
PHASE_POINTS_PER_DECADE = 200


@contextlib.contextmanager
def injector_guard(bench: Bench) -> Iterator[None]:
    """Turn a numerical failure of the injector model into an error naming the bench file's
    [injector] values (the allowed ranges keep each value sane; this catches combinations)."""
    try:
        yield
    except InjectorValuesError as exc:
        raise FileKeyError(bench.source, "injector", str(exc)) from None
    except (ArithmeticError, ValueError, np.linalg.LinAlgError) as exc:
        raise FileKeyError(
            bench.source,
            "injector",
            "the injector model cannot be evaluated with these component values "
            f"({type(exc).__name__}: {exc}); check [injector], [injector.opamp] and [pin]",
        ) from None


def _plain(value: Any) -> Any:
    """JSON-able: numpy scalars to Python, non-finite floats to None, complex to re/im."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return [_plain(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, complex):
        return {"re": _plain(value.real), "im": _plain(value.imag)}
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def corners_dict(corners: Corners) -> dict[str, Any]:
    return _plain({name: getattr(corners, name) for name in corners.__dataclass_fields__})


def bench_warnings(model: InjectorModel, corners: Corners) -> list[str]:
    """Things about the injector itself a bench engineer should know before a run."""
    notes = []
    if math.isfinite(corners.phase_margin_deg) and corners.phase_margin_deg < LOW_PHASE_MARGIN_DEG:
        notes.append(
            f"the injector's loop has {corners.phase_margin_deg:.0f}° phase margin "
            f"(crossover {format_si(corners.crossover_hz, 'Hz', 3)}): the op-amp's "
            f"{format_si(model.opamp.output_resistance, 'Ω', 3)} output resistance with the pin's "
            f"{format_si(model.pin.capacitance, 'F', 3)} puts a pole inside the loop; "
            "an isolation resistor or less pin capacitance restores it"
        )
    if corners.peaking_db > PEAKING_WARN_DB:
        notes.append(
            f"the injector's gain peaks {corners.peaking_db:.1f} dB above its passband at "
            f"{format_si(corners.peak_hz, 'Hz', 3)}"
        )
    return notes


def coupling_warnings(plan: Plan, bench: Bench) -> list[str]:
    """What the scope's AC coupling does to this plan's low frequencies."""
    from benchseq.coupling import MEASURE_BELOW_HZ

    notes = []
    low = float(np.min(plan.frequencies))
    pin, out = bench.scope.pin, bench.scope.output
    if pin.coupling != out.coupling and low < MEASURE_BELOW_HZ:
        notes.append(
            f"the pin channel is {pin.coupling}-coupled and the output channel "
            f"{out.coupling}-coupled: below about ten times the scope's AC-coupling corner "
            "(often a few hertz) the ratio carries that corner's loss; couple both alike"
        )
    elif pin.coupling == "AC" and low < MEASURE_BELOW_HZ:
        notes.append(
            f"the plan reaches {format_si(low, 'Hz', 3)} with AC-coupled channels: the run "
            "first measures the scope's AC-coupling corner there (pin read AC- then "
            "DC-coupled with the pin DC offset away) and refers pin readings to the pin; "
            "within about twice that corner the readings lose signal and take longer"
        )
    return notes


# -- check_plan ------------------------------------------------------------------------------
@dataclass(frozen=True)
class ReasonGroup:
    """All points sharing one reason at one severity, with the worst of them."""

    code: str
    severity: str  # "refused" | "marginal"
    title: str
    count: int
    worst_point: int  # index into CheckReport's points (sweep points first, then repeats)
    worst_text: str
    first_points: tuple[int, ...]


@dataclass(frozen=True)
class PointVerdict:
    index: int  # sweep point id, or n + k for the k-th linearity repeat
    kind: str  # "sweep" | "linearity"
    frequency: float
    ripple_peak: float
    dc_level: float
    load_current: float
    verdict: str
    generator_pp: float
    messages: tuple[str, ...]


@dataclass(frozen=True)
class CheckReport:
    plan_source: str
    plan_title: str
    bench_name: str
    bench_source: str
    point_count: int  # sweep points
    repeat_count: int  # linearity repeats (checked too)
    ok_count: int
    marginal_count: int
    refused_count: int
    estimated_time_s: float
    time_breakdown: dict[str, float]  # s, per activity
    capture_estimate: str  # how capture time was estimated
    corners: Corners
    warnings: tuple[str, ...]
    groups: tuple[ReasonGroup, ...]
    worst: tuple[PointVerdict, ...]
    feasibility: CheckedPoints = field(repr=False)
    estimated_range_s: tuple[float, float] = (math.nan, math.nan)  # low, high
    assumed: dict[str, Any] = field(default_factory=dict)  # what the estimate assumed
    range_breakdown: dict[str, dict[str, float]] = field(default_factory=dict)  # low/high

    @property
    def exit_code(self) -> int:
        """0 when no point is refused, 1 otherwise."""
        return 1 if self.refused_count else 0

    @property
    def all_feasible(self) -> bool:
        return self.refused_count == 0

    def to_dict(self) -> dict[str, Any]:
        return _plain(
            {
                "plan": {"source": self.plan_source, "title": self.plan_title},
                "bench": {"name": self.bench_name, "source": self.bench_source},
                "point_count": self.point_count,
                "repeat_count": self.repeat_count,
                "ok": self.ok_count,
                "marginal": self.marginal_count,
                "refused": self.refused_count,
                "all_feasible": self.all_feasible,
                "estimated_time_s": self.estimated_time_s,
                "time_breakdown_s": self.time_breakdown,
                "capture_estimate": self.capture_estimate,
                "estimated_time_range_s": list(self.estimated_range_s),
                "estimate_assumes": self.assumed,
                "estimated_time_range_breakdown_s": self.range_breakdown,
                "corners": corners_dict(self.corners),
                "warnings": list(self.warnings),
                "reasons": [g.__dict__ for g in self.groups],
                "worst_points": [p.__dict__ for p in self.worst],
            }
        )


def _linearity_points(plan: Plan, sweep: Any) -> dict[str, np.ndarray]:
    """The linearity repeats: each sweep point at a chosen frequency, x each factor."""
    empty = np.zeros(0)
    lin = getattr(plan, "linearity", None)
    if lin is None or len(lin.frequencies) == 0:
        return {"frequency": empty, "ripple_peak": empty, "dc_level": empty, "load_current": empty}
    distinct, number = numbered(sweep.frequency)  # judged once per distinct frequency
    chosen = np.isclose(distinct[:, None], np.asarray(lin.frequencies)[None, :], rtol=1e-3)
    at = np.nonzero(chosen.any(axis=1)[number])[0]
    factors = np.asarray(lin.factors, dtype=float)
    return {
        "frequency": np.repeat(sweep.frequency[at], factors.size),
        "ripple_peak": (sweep.ripple_peak[at][:, None] * factors[None, :]).ravel(),
        "dc_level": np.repeat(sweep.dc_level[at], factors.size),
        "load_current": np.repeat(sweep.load_current[at], factors.size),
    }


def capture_seconds(frequency: np.ndarray, plan: Plan) -> tuple[np.ndarray, str]:
    """Cycle-bound capture time per point: the least any capture takes (min_cycles periods)."""
    rules = plan.capture
    cycles = rules.min_cycles / np.asarray(frequency, dtype=float)
    estimate = np.minimum(np.maximum(cycles, 1e-3), rules.max_time_s)
    return estimate, (
        f"cycle-bound estimate: max({rules.min_cycles} cycles, 1 ms) per point, at most "
        f"{format_si(rules.max_time_s, 's', 3)}; no averaging or range retries (a lower bound)"
    )


# What the sequencer spends on a point besides the planned capture and the settle wait.
# The planned capture is the planner's at the noise part of u the run's top-ups aim at
# (noise_target_db: the channel match takes its share of the target). A point's captures
# take between CAPTURE_SPREAD[0] and CAPTURE_SPREAD[1] times that (re-arms included): at
# least the plan (the pool met the target as planned), at most a trim's recapture of the
# first batch (benchseq.batches.PROBE_SHARE of the plan) on top of a pool topped up
# TOP_UP_MARGIN past its need (tests/perf/eta_accuracy.py prints the bench time split by
# activity beside it); instrument round trips (generator set, trigger, waveform reads, pin
# DC check) add POINT_ROUND_TRIPS_S per point; power-up (outputs on, first ranges)
# RUN_START_S once, and the AC-coupling corner measurement AC_CORNER_S when the plan
# reaches low enough for it.
CAPTURE_SPREAD = (1.0, 1.6)  # (1 + PROBE_SHARE 0.5) x TOP_UP_MARGIN 1.05, rounded up
POINT_ROUND_TRIPS_S = 0.002
RUN_START_S = 0.1
AC_CORNER_S = 3.2
# Without a previous result: the noise and the device's rejection the estimate assumes.
ASSUMED_NOISE_V = 40e-6  # V rms per sample at the output channel's scope input (front end)
# the device's output noise: white density with a 1/f rise below a corner (a low-noise
# regulator's output, from memory), and its low-frequency rejection (common practice for
# a linear regulator: 60 to 80 dB below its loop's corner)
ASSUMED_DENSITY = 40e-9  # V/√Hz, white part
ASSUMED_FLICKER_CORNER_HZ = 300.0
ASSUMED_REJECTION_DB = (60.0, 80.0)  # the range's low and high ends, at low frequency,
ASSUMED_LOOP_CORNER_HZ = 1e3  # falling 20 dB per decade above this corner
ASSUMED_LEAST_REJECTION_DB = 20.0


@dataclass(frozen=True)
class Likeness:
    """What a previous result of the same bench and device says of each frequency: the
    noise its captures showed and the rejection it measured (from its stored rows)."""

    source: str
    frequency: np.ndarray  # Hz, sorted
    noise: tuple[Any, ...]  # batches.NoiseGuess | None per frequency
    rejection_db: np.ndarray
    notes: tuple[str, ...] = ()

    def at(self, frequency: float) -> tuple[Any, float]:
        """The nearest stored frequency's (noise, rejection), nearest on a log scale."""
        k = int(np.argmin(np.abs(np.log(self.frequency / frequency))))
        return self.noise[k], float(self.rejection_db[k])


def load_likeness(path: str | Path, plan: Plan, bench: Bench) -> Likeness:
    """A previous result file read for the estimate (BadInput naming it when unreadable or
    without measured points); a different bench or device is noted, not refused."""
    from benchseq import batches
    from benchseq.results import read_meta, read_results

    try:
        meta = read_meta(path)
        rows = read_results(path)
    except Exception as exc:  # any unreadable file: one clear message
        raise BadInput(f"--like {path}: cannot read it as a result file ({exc})") from None
    needed = ("frequency", "output_floor", "output_noise", "pin_sigma", "sample_interval")
    if len(rows) == 0 or any(name not in rows for name in needed):
        raise BadInput(f"--like {path}: holds no measured points to estimate from")
    notes = []
    if str(meta.get("bench_name", "")) != bench.name:
        notes.append(f"{path} was measured on {meta.get('bench_name')!r}, not {bench.name!r}")
    if str(meta.get("device", "")) != plan.device_name:
        notes.append(f"{path} measured {meta.get('device')!r}, not {plan.device_name!r}")
    rows = rows.sort_values("frequency")
    noise = []
    rejection = []
    for _, row in rows.iterrows():
        noise.append(
            batches.NoiseGuess.from_point(
                float(row["output_floor"]),
                float(row["output_noise"]),
                float(row["pin_sigma"]),
                float(row["sample_interval"]),
                int(row["record_length"]),
                int(row["averages"]),
            )
        )
        value = float(row["bound_db"] if row["is_bound"] else row["rejection_db"])
        rejection.append(value if math.isfinite(value) else ASSUMED_REJECTION_DB[0])
    return Likeness(
        str(path),
        np.asarray(rows["frequency"], dtype=float),
        tuple(noise),
        np.asarray(rejection, dtype=float),
        tuple(notes),
    )


@dataclass(frozen=True)
class ScenarioLikeness:
    """What a simulated bench's scenario states of each point (for the time estimate): the
    device's rejection at the point's DC level and load (its model's transfer), the output
    channel's noise (the scope's front-end noise at the range the output needs, the 8-bit
    converter's quantisation, the device's output noise density with its 1/f corner) and
    the pin channel's (front end at the pin's range through its probe, the injector's own
    noise). A real bench has no scenario: the estimate assumes, or uses --like."""

    source: str
    scenario: Any  # benchseq.sim.scenario.Scenario
    ranges: tuple[float, ...]  # the scope's full-scale ranges, pp V at its input
    output_probe: float
    pin_probe: float
    bandwidth_limit: float | None  # Hz
    notes: tuple[str, ...] = ()

    def rejection_db(self, frequency: float, dc_level: float, load_current: float) -> float:
        from benchseq.sim.devices import OperatingPoint, rejection_db

        device = self.scenario.device
        drawn = load_current if math.isfinite(load_current) else 0.0
        op = OperatingPoint(dc_level, device.board_load_current + drawn)
        value = float(rejection_db(device, np.array([frequency]), op)[0])
        return value if math.isfinite(value) else ASSUMED_REJECTION_DB[0]

    def _front_end(self, full_scale: float, probe: float) -> float:
        """V rms per sample at the probe tip on a range (pp V at the tip)."""
        scope = self.scenario.scope
        at_input = full_scale / probe
        noise = math.hypot(scope.noise_per_division * at_input / scope.divisions, scope.noise_floor)
        if self.bandwidth_limit is not None:
            noise *= math.sqrt(min(1.0, self.bandwidth_limit / scope.analog_bandwidth))
        step = at_input / 256.0  # the 8-bit converter's code step: step²/12 of noise
        return probe * math.hypot(noise, step / math.sqrt(12.0))

    def _ranged(self, amplitude: float, probe: float, extra: float) -> float:
        """The white noise per sample (V at the tip) on the range the run settles on: the
        smallest holding the sine and 4σ of noise at the run's fill of full scale."""
        from benchseq import analysis
        from benchseq.sequencer import RANGE_FILL

        tips = [r * probe for r in self.ranges]
        sigma = math.hypot(self._front_end(min(tips), probe), extra)
        for _ in range(3):  # the range sets the noise, the noise the range
            full = analysis.suggest_range(2.0 * (amplitude + 4.0 * sigma), tips, RANGE_FILL)
            sigma = math.hypot(self._front_end(full, probe), extra)
        return sigma

    def noise(self, frequency: float, pin_peak: float, output_peak: float) -> Any:
        from benchseq import batches

        truth = self.scenario
        device = truth.device
        white = float(getattr(device, "white_noise", 0.0))
        corner = float(getattr(device, "flicker_corner", 0.0))
        band = float(getattr(device, "noise_bandwidth", math.inf))
        coloured = (
            white**2 * (1.0 + corner / max(frequency, 1e-3)) / (1.0 + (frequency / band) ** 2)
        )
        injector = truth.pin_noise * math.sqrt(0.5 * math.pi * truth.pin_noise_bandwidth)
        return batches.NoiseGuess(
            self._ranged(output_peak, self.output_probe, 0.0),
            coloured,
            self._ranged(pin_peak, self.pin_probe, injector),
        )


def scenario_likeness(plan: Plan, bench: Bench) -> ScenarioLikeness | None:
    """The bench's scenario when it is the simulated bench (None for a real bench, or when
    the scenario cannot be read: the run would refuse it, and the estimate assumes)."""
    if bench.simulation is None:
        return None
    from benchseq.drivers.factory import profile_for
    from benchseq.sim.scenario import load_scenario

    try:
        scenario = load_scenario(bench.simulation)
        caps = profile_for(bench.instruments["scope"], bench).capabilities
    except (BenchseqError, KeyError, OSError, ValueError):
        return None
    if caps is None or not getattr(caps, "ranges", None):
        return None
    return ScenarioLikeness(
        f"the simulated bench's scenario {scenario.name!r}",
        scenario,
        tuple(float(r) for r in caps.ranges),
        float(bench.scope.output.probe),
        float(bench.scope.pin.probe),
        bench.scope.bandwidth_limit,
    )


def scope_timebase(plan: Plan, bench: Bench) -> Any:
    """The bench scope's timebase limits (from its profile) with the plan's averaging cap."""
    from benchseq import analysis
    from benchseq.drivers.factory import profile_for

    caps = profile_for(bench.instruments["scope"], bench).capabilities
    if caps is None:
        raise BadInput(f"{bench.source}: the scope's profile gives no capabilities")
    return analysis.ScopeTimebase(
        caps.sample_intervals,
        caps.record_lengths,
        max(1, min(int(caps.max_averages), int(plan.capture.max_averages))),
        caps.rearm_time,
    )


def match_uncertainty(bench: Bench, frequency: np.ndarray) -> np.ndarray:
    """Per frequency, the channel match's relative u (k = 1) the run's budget will carry:
    the bench calibration's where it covers the frequency, else the uncalibrated channels'
    and probes' tolerances (as the run puts them in each point's budget)."""
    f = np.asarray(frequency, dtype=float)
    tolerance = float(bench.scope.tolerances().uncertainty)
    out = np.full(f.shape, tolerance)
    if bench.scope.calibration is not None:
        from benchseq.calibrate import load_calibration

        try:
            table = load_calibration(bench.scope.calibration).table
        except BadInput:  # the run refuses it before anything is switched on
            return out
        for k in range(f.size):
            found = table.lookup(float(f[k]))
            if found.inside:
                out[k] = found.uncertainty
    return out


def noise_target_db(target_db: float, match_u: float) -> float:
    """What the run's top-ups aim the noise part of u at (benchseq.batches.top_up): what the
    channel match leaves of the target, u_n² = u_t² − u_match², but at least NOISE_SHARE of
    the target (where the match alone uses up the target)."""
    from benchseq import analysis, batches

    budget = target_db**2 - analysis.db_uncertainty(match_u) ** 2
    return math.sqrt(max(budget, (batches.NOISE_SHARE * target_db) ** 2))


def planned_capture_s(
    plan: Plan,
    bench: Bench,
    frequency: np.ndarray,
    ripple_peak: np.ndarray,
    like: Likeness | ScenarioLikeness | None = None,
    dc_level: np.ndarray | None = None,
    load_current: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Per point, the capture planner's bench time (re-arms included; noise-bound or
    cycle-bound, whichever the point needs, at the noise part of u the run aims at) under
    the low and the high end's assumptions: a previous result's noise and rejection at the
    nearest frequency, or the simulated bench's scenario at the point (DC level and load
    current, default: none given, the scenario's rejection at 5 V without load), both ends
    alike; else ASSUMED_NOISE_V with ASSUMED_REJECTION_DB's two values."""
    from benchseq import batches

    timebase = scope_timebase(plan, bench)
    rules = plan.capture
    f = np.asarray(frequency, dtype=float).ravel()
    pin = np.asarray(ripple_peak, dtype=float).ravel()
    if f.size == 0:
        return np.zeros(0), np.zeros(0)
    if isinstance(like, ScenarioLikeness):
        return _scenario_capture_s(plan, bench, timebase, f, pin, like, dc_level, load_current)
    # the planner runs once per (frequency, ripple), rounded to 1 µHz and 1 pV: points of
    # one such key take the first one's estimate (many points share a frequency and ripple)
    rep, inverse = _first_of_keys(f, pin)
    fr, pr = f[rep], pin[rep]
    # what the estimate assumes depends on the frequency alone: once per distinct one
    fu, fi = numbered(fr)
    # the noise part of u the run aims at, after the channel match's part (per frequency)
    target = np.array(
        [
            noise_target_db(rules.target_uncertainty_db, float(m))
            for m in match_uncertainty(bench, fu).tolist()
        ]
    )[fi]
    ends = []
    for end in (0, 1):
        white, coloured, pin_sigma, scale = [], [], [], []
        for fk in fu.tolist():
            if isinstance(like, Likeness):
                noise, rejection = like.at(fk)
                guess = noise or batches.NoiseGuess(ASSUMED_NOISE_V)
            else:
                density = ASSUMED_DENSITY**2 * (1.0 + ASSUMED_FLICKER_CORNER_HZ / fk)
                guess = batches.NoiseGuess(ASSUMED_NOISE_V, density)
                fall = 20.0 * math.log10(1.0 + fk / ASSUMED_LOOP_CORNER_HZ)
                rejection = max(ASSUMED_REJECTION_DB[end] - fall, ASSUMED_LEAST_REJECTION_DB)
            white.append(guess.white_sigma)
            coloured.append(guess.coloured)
            pin_sigma.append(math.nan if guess.pin_sigma is None else guess.pin_sigma)
            scale.append(10 ** (-rejection / 20.0))
        ends.append(
            batches.predicted_bench_times(
                timebase,
                fr,
                pr,
                np.maximum(pr * np.array(scale)[fi], 1e-12),
                np.array(white)[fi],
                np.array(coloured)[fi],
                np.array(pin_sigma)[fi],
                target,
                rules.min_cycles,
                rules.max_time_s,
                lean=True,
            )[inverse]
        )
    return ends[0], ends[1]


def _first_of_keys(f: np.ndarray, pin: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(index of the first point of each key, each point's position among them), the key
    being (round(f, 6), round(pin, 12)) as Python rounds."""
    keys = []
    for values, digits in ((f, 6), (pin, 12)):
        distinct, number = numbered(values)
        rounded, slot = numbered([round(x, digits) for x in distinct.tolist()])
        keys.append((slot[number], rounded.size))
        del number
    _, _, key = pairs(keys[0][0], keys[0][1], keys[1][0], keys[1][1])
    del keys
    return first_of(key, int(key.max()) + 1), key


def _scenario_capture_s(
    plan: Plan,
    bench: Bench,
    timebase: Any,
    f: np.ndarray,
    pin: np.ndarray,
    like: ScenarioLikeness,
    dc_level: np.ndarray | None,
    load_current: np.ndarray | None,
) -> tuple[np.ndarray, np.ndarray]:
    """planned_capture_s on the simulated bench: its scenario's noise and rejection at each
    point's frequency, ripple, DC level and load (once per distinct such point)."""
    dc = np.full(f.shape, 5.0) if dc_level is None else np.asarray(dc_level, dtype=float)
    load = (
        np.full(f.shape, np.nan) if load_current is None else np.asarray(load_current, dtype=float)
    )
    out = np.zeros((2, f.size))
    match = match_uncertainty(bench, f)
    cache: dict[tuple[float, ...], float] = {}
    for k in range(f.size):
        key = (
            round(float(f[k]), 6),
            round(float(pin[k]), 12),
            float(match[k]),
            round(float(dc[k]), 6),
            round(float(load[k]), 9),
        )
        if key not in cache:
            rejection = like.rejection_db(float(f[k]), float(dc[k]), float(load[k]))
            output = float(pin[k]) * 10 ** (-rejection / 20.0)
            guess = like.noise(float(f[k]), float(pin[k]), output)
            cache[key] = _planned_s(
                timebase, plan, float(f[k]), float(pin[k]), guess, rejection, match[k]
            )
        out[:, k] = cache[key]  # the scenario states one noise and rejection: both ends alike
    return out[0], out[1]


def _planned_s(
    timebase: Any,
    plan: Plan,
    frequency: float,
    pin: float,
    guess: Any,
    rejection_db: float,
    match_u: float,
) -> float:
    """The capture planner's bench time for one point under one noise and rejection."""
    from benchseq import batches

    rules = plan.capture
    expected = batches.predicted_plan(
        timebase,
        frequency,
        pin,
        max(pin * 10 ** (-rejection_db / 20.0), 1e-12),
        guess,
        noise_target_db(rules.target_uncertainty_db, float(match_u)),
        rules.min_cycles,
        rules.max_time_s,
        lean=True,
    )
    return float(expected.bench_time)


def measured_point_s(
    plan: Plan,
    bench: Bench,
    frequency: float,
    ripple_peak: float,
    guess: Any,
    rejection_db: float,
    timebase: Any = None,
) -> float:
    """One point's captures and round trips (the middle of the range) under the noise and
    rejection a measured point showed (benchseq.batches.NoiseGuess.from_point);
    ``timebase``: scope_timebase(plan, bench), given when called often."""
    timebase = timebase if timebase is not None else scope_timebase(plan, bench)
    match = float(match_uncertainty(bench, np.array([frequency]))[0])
    planned = _planned_s(timebase, plan, frequency, ripple_peak, guess, rejection_db, match)
    return math.sqrt(CAPTURE_SPREAD[0] * CAPTURE_SPREAD[1]) * planned + POINT_ROUND_TRIPS_S


def point_seconds(
    plan: Plan,
    bench: Bench,
    frequency: np.ndarray,
    ripple_peak: np.ndarray,
    like: Likeness | ScenarioLikeness | None = None,
    dc_level: np.ndarray | None = None,
    load_current: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Per point, the bench time (s) of its captures and round trips, low and high ends
    (settle waits, ramps and operating-point waits are counted apart)."""
    low, high = planned_capture_s(plan, bench, frequency, ripple_peak, like, dc_level, load_current)
    for end, capture in ((0, low), (1, high)):  # in place: a million points' arrays
        capture *= CAPTURE_SPREAD[end]
        capture += POINT_ROUND_TRIPS_S
    return low, high


def assumptions(plan: Plan, like: Likeness | ScenarioLikeness | None) -> dict[str, Any]:
    """What the estimate assumed, for the report and its JSON."""
    out: dict[str, Any] = {
        "capture_spread": list(CAPTURE_SPREAD),
        "round_trips_per_point_s": POINT_ROUND_TRIPS_S,
        "target_uncertainty_db": plan.capture.target_uncertainty_db,
    }
    if isinstance(like, ScenarioLikeness):
        truth = like.scenario
        out.update(
            source="scenario",
            scenario=truth.name,
            device_model=str(getattr(truth.device, "kind", "")),
            scope_noise_floor_v_rms=truth.scope.noise_floor,
            scope_noise_per_division=truth.scope.noise_per_division,
            output_noise_density_v_per_rthz=getattr(truth.device, "white_noise", None),
            flicker_corner_hz=getattr(truth.device, "flicker_corner", None),
            notes=list(like.notes),
        )
    elif like is None:
        out.update(
            source="assumed",
            noise_v_rms=ASSUMED_NOISE_V,
            output_noise_density_v_per_rthz=ASSUMED_DENSITY,
            flicker_corner_hz=ASSUMED_FLICKER_CORNER_HZ,
            rejection_db=list(ASSUMED_REJECTION_DB),
            rejection_corner_hz=ASSUMED_LOOP_CORNER_HZ,
        )
    else:
        out.update(source=like.source, notes=list(like.notes))
    return out


def _time_budget(
    plan: Plan,
    bench: Bench,
    sweep: Any,
    repeats: dict[str, np.ndarray],
    model: InjectorModel,
    like: Likeness | ScenarioLikeness | None = None,
) -> tuple[float, dict[str, float], str, tuple[float, float], dict[str, dict[str, float]]]:
    n = len(sweep)
    settling = Settling(plan.settle, model, plan.capture.target_uncertainty_db)
    rf, rp = repeats["frequency"], repeats["ripple_peak"]
    repeat_emf = settling.emf_for(rf, rp)  # a repeat follows its point at the same frequency
    settle_waits = float(np.sum(settling.planned(sweep.frequency, sweep.ripple_peak))) + float(
        np.sum(settling.change(rf, repeat_emf, rf, repeat_emf, rp))
    )
    dc = np.asarray(sweep.dc_level, dtype=float)
    load = np.asarray(sweep.load_current, dtype=float)
    previous_dc = np.concatenate([[0.0], dc[:-1]])
    dc_moves = np.abs(dc - previous_dc) > 1e-9
    load_key = np.where(np.isfinite(load), load, -1.0)
    load_moves = np.concatenate(
        [[np.isfinite(load[0])] if n else [], load_key[1:] != load_key[:-1]]
    )
    ramp = float(np.sum(np.abs(dc - previous_dc))) / bench.supply.ramp_rate
    smallest = float(np.min(sweep.ripple_peak)) if n else 0.0
    steps = (dc - previous_dc)[dc_moves]
    bias_wait = float(np.sum(settling.dc_step(steps, smallest))) if steps.size else 0.0
    operating = plan.settle.operating_point_s * float(np.count_nonzero(dc_moves | load_moves))
    del previous_dc, dc_moves, load_key, load_moves  # per-point arrays no longer needed
    every_f = np.concatenate([sweep.frequency, rf])
    every_ripple = np.concatenate([sweep.ripple_peak, rp])
    captures, method = capture_seconds(every_f, plan)
    low, high = point_seconds(
        plan,
        bench,
        every_f,
        every_ripple,
        like,
        np.concatenate([dc, repeats["dc_level"]]),
        np.concatenate([load, repeats["load_current"]]),
    )
    floor = getattr(plan, "floor", None)
    floor_s = 0.0
    floor_hit = np.zeros(n, dtype=bool)
    if floor is not None:
        if floor.every_point:
            floor_hit[:] = True
        elif len(floor.frequencies):
            distinct, number = numbered(sweep.frequency)  # once per distinct frequency
            hit = np.isclose(distinct[:, None], np.asarray(floor.frequencies)[None, :], rtol=1e-3)
            floor_hit = hit.any(axis=1)[number]
        floor_s = float(np.sum(captures[:n][floor_hit]))
    from benchseq.coupling import MEASURE_BELOW_HZ

    corner = (
        AC_CORNER_S
        if n
        and bench.scope.pin.coupling == "AC"
        and float(np.min(sweep.frequency)) < MEASURE_BELOW_HZ
        else 0.0
    )
    breakdown = {
        "settling": settle_waits,
        "dc_ramps": ramp,
        "bias_filter": bias_wait,
        "operating_point_waits": operating,
        "captures": float(np.sum(captures)),
        "floor_captures": floor_s,
    }
    # a floor capture takes about what the point's own planned capture takes
    ends = {}
    for end, per_point in (("low", low), ("high", high)):
        ends[end] = {
            "settling": settle_waits,
            "dc_ramps": ramp,
            "bias_filter": bias_wait,
            "operating_point_waits": operating,
            "captures": float(np.sum(per_point)),
            "floor_captures": float(np.sum(per_point[:n][floor_hit])),
            "run_start": RUN_START_S + corner,
        }
    span = (float(sum(ends["low"].values())), float(sum(ends["high"].values())))
    total = math.sqrt(span[0] * span[1]) if span[0] > 0 else 0.0
    method = (
        "capture planner's noise-bound captures"
        + (
            f" with the noise and rejection {'stated by' if isinstance(like, ScenarioLikeness) else 'measured in'} {like.source}"
            if like
            else f" assuming {format_si(ASSUMED_NOISE_V, 'V', 2)} rms scope noise per sample, "
            f"{format_si(ASSUMED_DENSITY, 'V', 2)}/√Hz output noise with a 1/f corner at "
            f"{format_si(ASSUMED_FLICKER_CORNER_HZ, 'Hz', 3)} and "
            f"{ASSUMED_REJECTION_DB[0]:g}–{ASSUMED_REJECTION_DB[1]:g} dB rejection falling "
            f"20 dB/decade above {format_si(ASSUMED_LOOP_CORNER_HZ, 'Hz', 3)}"
        )
        + ", plus settle waits, ramps, operating-point waits and per-point round trips"
    )
    return total, breakdown, method, span, ends


def check_plan(
    plan: Plan, bench: Bench, like: Likeness | None = None, scenario: bool = True
) -> CheckReport:
    """Feasibility of every planned point (and linearity repeat), bench time, reasons.
    ``like``: a previous result's noise and rejection for the time estimate; without it,
    on the simulated bench, its scenario's (``scenario=False``: the stated assumptions)."""
    with injector_guard(bench):
        source: Likeness | ScenarioLikeness | None = like
        if source is None and scenario:
            source = scenario_likeness(plan, bench)
        return _check_plan(plan, bench, source)


def _check_plan(
    plan: Plan, bench: Bench, like: Likeness | ScenarioLikeness | None = None
) -> CheckReport:
    model = InjectorModel(bench.injector, bench.generator, bench.pin)
    corners = model.corners()
    sweep = plan.point_values()
    n = len(sweep)
    repeats = _linearity_points(plan, sweep)
    device: DeviceLimitsLike = plan.device
    if bench.load is not None and (
        device.max_load_current is None or bench.load.max_current < device.max_load_current
    ):
        device = _Limits(device.absolute_max_v, device.min_operating_v, bench.load.max_current)
    feas = _checked_points(model, sweep, repeats, device, bench.supply.overvoltage_protection)
    total, breakdown, method, span, ends = _time_budget(plan, bench, sweep, repeats, model, like)
    groups = feas.groups
    worst_ids = sorted({g.worst_point for g in groups if g.severity == "refused"})
    worst_ids += sorted(
        {g.worst_point for g in groups if g.severity == "marginal"} - set(worst_ids)
    )
    listed = np.array(worst_ids[:WORST_LISTED], dtype=np.int64)
    figures = feas.at(listed)
    worst = tuple(_point(figures, k, int(i), n) for k, i in enumerate(listed.tolist()))
    return CheckReport(
        plan_source=plan.source,
        plan_title=plan.title,
        bench_name=bench.name,
        bench_source=bench.source,
        point_count=n,
        repeat_count=int(repeats["frequency"].size),
        ok_count=int(np.count_nonzero(feas.ok)),
        marginal_count=int(np.count_nonzero(feas.marginal)),
        refused_count=int(np.count_nonzero(feas.refused)),
        estimated_time_s=total,
        time_breakdown=breakdown,
        capture_estimate=method,
        estimated_range_s=span,
        range_breakdown=ends,
        assumed=assumptions(plan, like),
        corners=corners,
        warnings=tuple(
            bench_warnings(model, corners)
            + coupling_warnings(plan, bench)
            + plan_bench_warnings(plan, bench)
        ),
        groups=groups,
        worst=worst,
        feasibility=feas,
    )


CHECK_BLOCK = 1 << 16  # points judged at once (the per-point figures of one block)


@dataclass(frozen=True, eq=False)
class CheckedPoints:
    """Every checked point's verdict, compactly (sweep points first, then the linearity
    repeats): the reasons as bits of REASON_BIT per point; a point's figures and sentences
    (a Feasibility) are computed again on request with ``at``."""

    refused_bits: np.ndarray  # int16, OR of REASON_BIT
    marginal_bits: np.ndarray  # int16, OR of REASON_BIT
    groups: tuple[ReasonGroup, ...]
    judge: Any = field(repr=False)  # indices -> Feasibility of those points

    def __len__(self) -> int:
        return int(self.refused_bits.size)

    @property
    def refused(self) -> np.ndarray:
        return self.refused_bits != 0

    @property
    def marginal(self) -> np.ndarray:
        return (self.refused_bits == 0) & (self.marginal_bits != 0)

    @property
    def ok(self) -> np.ndarray:
        return (self.refused_bits == 0) & (self.marginal_bits == 0)

    @property
    def verdict(self) -> np.ndarray:
        """'ok' / 'marginal' / 'refused' per point."""
        out = np.full(len(self), "ok", dtype=object)
        out[self.marginal] = "marginal"
        out[self.refused] = "refused"
        return out

    def count(self, code: str, severity: str = "refused") -> int:
        bits = self.refused_bits if severity == "refused" else self.marginal_bits
        return int(np.count_nonzero(bits & REASON_BIT[code]))

    def indices(self, code: str, severity: str = "refused") -> np.ndarray:
        bits = self.refused_bits if severity == "refused" else self.marginal_bits
        return np.nonzero(bits & REASON_BIT[code])[0]

    def at(self, indices: Any) -> Feasibility:
        """The full feasibility (figures, limits, sentences) of the points ``indices``."""
        return self.judge(np.atleast_1d(np.asarray(indices, dtype=np.int64)))

    def messages(self, i: int) -> list[str]:
        """Human sentences for point ``i``'s reasons, with the numbers."""
        return self.at([i]).messages(0)


def _checked_points(
    model: InjectorModel,
    sweep: Any,
    repeats: dict[str, np.ndarray],
    device: DeviceLimitsLike,
    protection: float | None,
) -> CheckedPoints:
    """The feasibility of every point, judged a block at a time: the verdict bits of each
    point and, per reason, its count, first points and worst point are kept; the figures
    are not (``CheckedPoints.at`` computes them again for the points asked)."""
    n = len(sweep)
    total = n + int(repeats["frequency"].size)
    names = ("frequency", "ripple_peak", "dc_level", "load_current")

    def values(start: int, stop: int) -> list[np.ndarray]:
        if stop <= n:
            return [getattr(sweep, name)[start:stop] for name in names]
        return [
            np.concatenate([getattr(sweep, name)[start:n], repeats[name][: stop - n]])
            if start < n
            else repeats[name][start - n : stop - n]
            for name in names
        ]

    def judge(indices: np.ndarray) -> Feasibility:
        where = [
            np.where(indices < n, getattr(sweep, name)[np.minimum(indices, max(n - 1, 0))], 0.0)
            if n
            else np.zeros(indices.size)
            for name in names
        ]
        if repeats["frequency"].size:
            back = np.clip(indices - n, 0, repeats["frequency"].size - 1)
            where = [
                np.where(indices < n, w, repeats[name][back])
                for w, name in zip(where, names, strict=True)
            ]
        return model.feasibility(*where, device=device, supply_protection_v=protection)

    refused = np.zeros(total, dtype=np.int16)
    marginal = np.zeros(total, dtype=np.int16)
    found: dict[tuple[str, str], dict[str, Any]] = {}
    for start in range(0, total, CHECK_BLOCK):
        stop = min(start + CHECK_BLOCK, total)
        feas = model.feasibility(
            *values(start, stop), device=device, supply_protection_v=protection
        )
        refused[start:stop] = feas.refused_bits
        marginal[start:stop] = feas.marginal_bits
        for severity in ("refused", "marginal"):
            for code in REASONS:
                ids = feas.indices(code, severity)
                if ids.size == 0:
                    continue
                size = np.nan_to_num(feas.severity[code][ids], nan=-np.inf)
                j = int(np.argmax(size))
                group = found.setdefault(
                    (severity, code), {"count": 0, "first": [], "worst": -1, "size": -np.inf}
                )
                group["count"] += int(ids.size)
                group["first"] += [start + int(i) for i in ids[: 20 - len(group["first"])]]
                if group["worst"] < 0 or size[j] > group["size"]:
                    group["worst"], group["size"] = start + int(ids[j]), float(size[j])
    out = []
    for severity in ("refused", "marginal"):
        for code in REASONS:
            kept = found.get((severity, code))
            if kept is None:
                continue
            worst = kept["worst"]
            point = judge(np.array([worst]))
            text = next(
                (
                    m
                    for (c, _), m in zip(point.reasons(0), point.messages(0), strict=True)
                    if c == code
                ),
                REASON_TITLES[code],
            )
            out.append(
                ReasonGroup(
                    code=code,
                    severity=severity,
                    title=REASON_TITLES[code],
                    count=kept["count"],
                    worst_point=worst,
                    worst_text=text,
                    first_points=tuple(kept["first"]),
                )
            )
    return CheckedPoints(refused, marginal, tuple(out), judge)


@dataclass(frozen=True)
class _Limits:
    absolute_max_v: float
    min_operating_v: float
    max_load_current: float | None


def _point(feas: Feasibility, k: int, i: int, n: int) -> PointVerdict:
    """Point ``i`` of the check, whose figures are row ``k`` of ``feas``."""
    return PointVerdict(
        index=i,
        kind="sweep" if i < n else "linearity",
        frequency=float(feas.frequency[k]),
        ripple_peak=float(feas.ripple_peak[k]),
        dc_level=float(feas.dc_level[k]),
        load_current=float(feas.dc_current[k]),
        verdict=str(feas.verdict[k]),
        generator_pp=float(feas.generator_pp[k]),
        messages=tuple(feas.messages(k)),
    )


# -- injector_report ---------------------------------------------------------------------------
@dataclass(frozen=True)
class SpotRow:
    frequency: float  # Hz
    gain: complex  # V_pin / V_emf
    gain_db: float
    phase_deg: float
    pin_per_displayed: float  # V_pin per displayed generator volt (magnitude)
    dc_path_db: float  # |V_pin / V_dc| in dB
    output_impedance: float  # Ω, magnitude
    usable: bool
    generator_pp: float | None  # displayed Vpp for the asked ripple (None without one)
    verdict: str | None  # feasibility of that ripple at this frequency (no device limits)


@dataclass(frozen=True)
class InjectorReport:
    bench_name: str
    load_mode: str
    corners: Corners
    ripple: Amplitude | None
    full_power_bandwidth_hz: float | None  # SR/(2π·ripple peak), for the asked ripple
    rows: tuple[SpotRow, ...]
    warnings: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        return _plain(
            {
                "bench": self.bench_name,
                "generator_load_mode": self.load_mode,
                "corners": corners_dict(self.corners),
                "usable_band_hz": list(self.corners.usable_band),
                "ripple_peak": None if self.ripple is None else self.ripple.peak,
                "ripple_as_written": None if self.ripple is None else self.ripple.as_written(),
                "full_power_bandwidth_hz": self.full_power_bandwidth_hz,
                "spot": [row.__dict__ for row in self.rows],
                "warnings": list(self.warnings),
            }
        )


def injector_report(bench: Bench, ripple: Amplitude | None = None) -> InjectorReport:
    """The injector at the spot frequencies, its corners and usable band, generator set-points."""
    with injector_guard(bench):
        return _injector_report(bench, ripple)


def _injector_report(bench: Bench, ripple: Amplitude | None) -> InjectorReport:
    model = InjectorModel(bench.injector, bench.generator, bench.pin)
    corners = model.corners()
    f = np.array(SPOT_FREQUENCIES)
    gain = model.ac_gain(f)
    phase_deg = unwrapped_phase_deg(model, f)
    usable = model.usable_mask(f)
    dc_path = 20 * np.log10(np.abs(model.dc_gain(f)))
    zout = np.abs(model.output_impedance(f))
    per_displayed = np.abs(model.pin_per_displayed(f))
    setting: list[float | None] = [None] * f.size
    verdicts: list[str | None] = [None] * f.size
    fpbw = None
    if ripple is not None:
        setting = [float(x) for x in model.generator_setting_pp(f, ripple.peak)]
        # the DC level belongs to a plan: judge the ripple at the middle of the output swing
        dc = 0.5 * (model.opamp.output_low + model.opamp.output_high)
        verdicts = list(model.feasibility(f, ripple.peak, dc).verdict)
        fpbw = model.full_power_bandwidth(ripple.peak)
    rows = tuple(
        SpotRow(
            frequency=float(f[k]),
            gain=complex(gain[k]),
            gain_db=float(20 * np.log10(abs(gain[k]))),
            phase_deg=float(phase_deg[k]),
            pin_per_displayed=float(per_displayed[k]),
            dc_path_db=float(dc_path[k]),
            output_impedance=float(zout[k]),
            usable=bool(usable[k]),
            generator_pp=setting[k],
            verdict=verdicts[k],
        )
        for k in range(f.size)
    )
    return InjectorReport(
        bench_name=bench.name,
        load_mode=bench.generator.load_mode,
        corners=corners,
        ripple=ripple,
        full_power_bandwidth_hz=fpbw,
        rows=rows,
        warnings=tuple(bench_warnings(model, corners)),
    )


def plot_injector(bench: Bench, path: str | Path, ripple: Amplitude | None = None) -> Path:
    """A Bode-style PNG: pin ripple per EMF and the DC path, with corners and usable band."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    out = plot_target(path)
    with injector_guard(bench):
        model = InjectorModel(bench.injector, bench.generator, bench.pin)
        corners = model.corners()
        f = np.logspace(0, 8, 800)
        gain = model.ac_gain(f)
        phase_deg = unwrapped_phase_deg(model, f)
    fig = Figure(figsize=(8, 6), dpi=110)
    FigureCanvasAgg(fig)
    mag, phase = fig.subplots(2, 1, sharex=True)
    mag.semilogx(f, 20 * np.log10(np.abs(gain)), label="pin / generator EMF")
    mag.semilogx(f, 20 * np.log10(np.abs(model.dc_gain(f))), label="pin / DC set-point", ls="--")
    phase.semilogx(f, phase_deg, label="pin / generator EMF")
    lo, hi = corners.usable_band
    for axis in (mag, phase):
        if math.isfinite(lo) and math.isfinite(hi):
            axis.axvspan(lo, hi, color="tab:green", alpha=0.08, label="usable band")
        for x in (corners.highpass_hz, corners.minus3db_hz):
            if math.isfinite(x):
                axis.axvline(x, color="grey", lw=0.8, ls=":")
        axis.grid(True, which="both", alpha=0.3)
    mag.set_ylabel("gain (dB)")
    mag.set_ylim(max(-80.0, float(np.min(20 * np.log10(np.abs(gain))))), None)
    phase.set_ylabel("phase (°)")
    phase.set_xlabel("frequency (Hz)")
    title = f"{bench.name}: injector ({bench.generator.load_mode} generator)"
    if ripple is not None:
        title += f", {ripple.as_written()} at the pin"
    mag.set_title(title, fontsize=9)
    mag.legend(fontsize=8, loc="lower center")
    fig.tight_layout()
    try:
        fig.savefig(out, format="png")
    except OSError as exc:
        raise BadInput(f"--plot {path}: cannot write the plot ({exc.strerror or exc})") from None
    return out


def plot_target(path: str | Path) -> Path:
    """The PNG file ``--plot`` names, refused (BadInput) before anything is computed when it
    is not a .png name, is a folder, or its folder does not exist."""
    out = Path(path)
    if out.is_dir():
        raise BadInput(f"--plot {path}: is a folder; give a file name such as bode.png")
    if out.suffix.lower() != ".png":
        raise BadInput(
            f"--plot {path}: the plot is a PNG image; give a file name ending in .png "
            f"(such as {out.with_suffix('.png').name})"
        )
    if not out.parent.is_dir():
        raise BadInput(f"--plot {path}: the folder {out.parent} does not exist")
    return out


def unwrapped_phase_deg(model: InjectorModel, frequency: Any) -> np.ndarray:
    """Phase of V_pin/V_emf in degrees, unwrapped continuously upwards from PHASE_FROM_HZ
    (the plot and the table both use it, so they show the same angle)."""
    f = np.asarray(frequency, dtype=float)
    top = max(float(np.max(f)), PHASE_FROM_HZ)
    decades = max(math.log10(top / PHASE_FROM_HZ), 0.0)
    count = int(decades * PHASE_POINTS_PER_DECADE) + 2
    dense = np.logspace(math.log10(PHASE_FROM_HZ), math.log10(top), count)
    grid = np.union1d(dense, f[f >= PHASE_FROM_HZ])
    unwrapped = np.degrees(np.unwrap(np.angle(model.ac_gain(grid))))
    at = np.clip(np.searchsorted(grid, f), 0, grid.size - 1)
    wrapped_below = np.degrees(np.angle(model.ac_gain(f)))
    return np.where(f >= PHASE_FROM_HZ, unwrapped[at], wrapped_below)


# -- rich renderables (for the CLI) -------------------------------------------------------------
def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.1f} s"
    minutes = seconds / 60
    if minutes < 120:
        return f"{minutes:.1f} min"
    return f"{minutes / 60:.1f} h"


def render_check(report: CheckReport) -> Any:
    """A rich renderable of a CheckReport."""
    from rich.console import Group
    from rich.table import Table
    from rich.text import Text

    head = Text()
    head.append(f"{report.plan_title}\n", style="bold")
    head.append(f"bench: {report.bench_name}\n")
    head.append(f"{report.point_count} points")
    if report.repeat_count:
        head.append(f" + {report.repeat_count} linearity repeats")
    low, high = report.estimated_range_s
    head.append(
        f"; {_duration(low)} – {_duration(high)} on the bench "
        f"(about {_duration(report.estimated_time_s)}; {report.capture_estimate})\n"
    )
    head.append(f"ok {report.ok_count}", style="green")
    head.append("  ")
    head.append(f"marginal {report.marginal_count}", style="yellow")
    head.append("  ")
    head.append(f"refused {report.refused_count}", style="red bold" if report.refused_count else "")
    c = report.corners
    head.append(
        f"\ninjector: passband {c.passband_gain:.3f} V/V, usable {describe_band(*c.usable_band)}"
    )
    parts: list[Any] = [head]
    for note in report.warnings:
        parts.append(Text(f"note: {note}", style="yellow"))
    if report.groups:
        table = Table(title="reasons", title_justify="left")
        for name in ("verdict", "reason", "points", "worst case"):
            table.add_column(name)
        for g in report.groups:
            style = "red" if g.severity == "refused" else "yellow"
            table.add_row(Text(g.severity, style=style), g.title, str(g.count), g.worst_text)
        parts.append(table)
    return Group(*parts)


def render_injector(report: InjectorReport) -> Any:
    """A rich renderable of an InjectorReport."""
    from rich.console import Group
    from rich.table import Table
    from rich.text import Text

    c = report.corners
    head = Text()
    head.append(f"{report.bench_name}\n", style="bold")
    head.append(
        f"passband {c.passband_gain:.3f} V/V ({20 * math.log10(abs(c.passband_gain)):.2f} dB), "
        f"noise gain {c.noise_gain:.3f}; high-pass {format_si(c.highpass_hz, 'Hz', 3)}, "
        f"bias low-pass {format_si(c.bias_lowpass_hz, 'Hz', 3)}; "
        f"−3 dB {format_si(c.minus3db_hz, 'Hz', 3)} "
        f"(GBW/noise gain {format_si(c.minus3db_estimate_hz, 'Hz', 3)})\n"
        f"usable band {describe_band(*c.usable_band)}; phase margin {c.phase_margin_deg:.0f}°; "
        f"settling time constant {format_si(c.slowest_time_constant_s, 's', 3)}; "
        f"generator in {report.load_mode} mode"
    )
    if report.ripple is not None and report.full_power_bandwidth_hz is not None:
        head.append(
            f"\n{report.ripple.as_written()} at the pin; full-power bandwidth "
            f"{format_si(report.full_power_bandwidth_hz, 'Hz', 3)}"
        )
    table = Table(title="spot frequencies", title_justify="left")
    columns = ["frequency", "gain dB", "phase °", "pin/displayed", "DC path dB", "|Zout|", "usable"]
    if report.ripple is not None:
        columns += ["generator", "verdict"]
    for name in columns:
        table.add_column(name, justify="right")
    for row in report.rows:
        cells = [
            format_si(row.frequency, "Hz", 3),
            f"{row.gain_db:.3f}",
            f"{row.phase_deg:.1f}",
            f"{row.pin_per_displayed:.4f}",
            f"{row.dc_path_db:.1f}",
            format_si(row.output_impedance, "Ω", 3),
            "yes" if row.usable else "no",
        ]
        if report.ripple is not None:
            cells += [format_si(row.generator_pp or math.nan, "Vpp", 3), row.verdict or ""]
        table.add_row(*cells)
    parts: list[Any] = [head, table]
    parts += [Text(f"note: {note}", style="yellow") for note in report.warnings]
    return Group(*parts)
