"""Plan file -> Plan: what to measure, portable between labs; Plan.expand() -> Sweep.

A plan names the frequencies, the ripple amplitudes at the device's supply pin, the DC
operating points and (optionally) load currents, the order in which to step them, how long
to settle and capture, the device's limits, an optional pass/fail mask and what to watch
for. Which instrument does what lives in the bench file (benchseq.bench), not here.

Every value is an SI float inside (Hz, V, A, s, dB); ripple amplitudes are peak volts with
the convention they were written in kept beside them. Every error is a FileKeyError that
names the file, the key path (list items 0-based: ``sweep.ripple[1]``) and what was expected.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from benchseq.errors import FileKeyError, unknown_key_message
from benchseq.ranges import PLAN_RANGES, Range
from benchseq.tomlfile import Section, read_toml
from benchseq.units import Amplitude, format_si

AXES = ("dc", "load", "ripple", "frequency")
FREQUENCY_RANGE = PLAN_RANGES["sweep.frequency"]
DEFAULT_ORDER = AXES  # outermost first: DC steps are slowest (bias filter), frequency fastest
ACTIONS = ("flag", "stop")
SETTLE_RULES = ("transient", "time-constants")  # benchseq.settling
WATCH_RULES = ("current_limit", "pin_dc", "distortion", "model_mismatch")
MAX_FREQUENCIES = 100_000  # per plan, after expansion
MAX_POINTS = 1_000_000  # per plan, after expansion
MATCH_TOLERANCE = 1e-3  # relative: a frequency named in [linearity]/[floor] vs a planned one
_CLEAN_DIGITS = 12  # expanded values are rounded to 12 significant digits (1e-12 relative)


# -- the parts of a plan -------------------------------------------------------------------
@dataclass(frozen=True)
class SettleRule:
    """How long to wait after a change before capturing (applied by benchseq.settling).

    Rule "transient" (default): after a frequency or amplitude change, until what is left of
    the injector's transient for that change is under a tenth of the point's target
    uncertainty, and at least ``fixed_s``. Rule "time-constants": ``fixed_s +
    time_constants`` x the injector's slowest time constant. After a DC level or load
    change, ``operating_point_s`` more (the device's own settling: no model knows it).
    """

    fixed_s: float = 0.0
    time_constants: float = 5.0
    operating_point_s: float = 0.0
    rule: str = "transient"

    def wait_s(self, slowest_time_constant_s: float) -> float:
        """Seconds to wait after a frequency or amplitude change under the "time-constants"
        rule (the "transient" rule depends on the change: benchseq.settling)."""
        return self.fixed_s + self.time_constants * slowest_time_constant_s


@dataclass(frozen=True)
class CaptureRules:
    """Limits for capture planning: cycles per record, time per capture, target, averages."""

    min_cycles: int = 10
    max_time_s: float = 10.0
    target_uncertainty_db: float = 0.1  # standard uncertainty (k = 1) of rejection_db
    max_averages: int = 64
    frequency_tolerance: float = 1e-3  # relative move allowed towards a coherent frequency


@dataclass(frozen=True)
class DeviceLimits:
    """The device under test and the limits of its supply pin (V, A)."""

    absolute_max_v: float
    min_operating_v: float
    max_load_current: float | None = None
    name: str = ""
    gain_db: float | None = None  # the device's closed-loop (noise) gain, input to output

    @property
    def gain_ratio(self) -> float | None:
        """The declared gain as a voltage ratio (V/V), None when not declared."""
        return None if self.gain_db is None else 10 ** (self.gain_db / 20.0)

    def __str__(self) -> str:
        return self.name


@dataclass(frozen=True, eq=False)
class Mask:
    """Pass/fail limit: rejection must be >= ``min_rejection_db`` (interpolated linearly in
    dB over log frequency between the points; no limit outside the mask's span)."""

    frequencies: np.ndarray  # Hz, strictly increasing
    min_rejection_db: np.ndarray  # dB, one per frequency
    name: str = ""

    def limit_at(self, frequency: Any) -> np.ndarray:
        """The minimum rejection in dB at ``frequency`` (Hz); nan outside the mask's span."""
        f = np.asarray(frequency, dtype=float)
        log_f = np.log10(np.where(f > 0, f, np.nan))
        log_mask = np.log10(self.frequencies)
        limit = np.interp(log_f, log_mask, self.min_rejection_db)
        span = (log_f >= log_mask[0] - 1e-12) & (log_f <= log_mask[-1] + 1e-12)
        return np.where(span, limit, np.nan)

    def margin_db(self, frequency: Any, rejection_db: Any) -> np.ndarray:
        """rejection - limit in dB (positive = passes with margin; nan where no limit)."""
        return np.asarray(rejection_db, dtype=float) - self.limit_at(frequency)

    def passes(self, frequency: Any, rejection_db: Any) -> np.ndarray:
        """True where the rejection meets the mask or no limit applies (nan rejection fails)."""
        limit = self.limit_at(frequency)
        rejection = np.asarray(rejection_db, dtype=float)
        return np.where(np.isnan(limit), True, rejection >= limit)


@dataclass(frozen=True)
class WatchRules:
    """What to look out for at every point, and whether to flag the point or stop the run."""

    current_limit: str = "stop"  # action when the supply or injector is current-limited
    pin_dc: str = "stop"  # action when the pin's DC level is outside the device limits
    distortion: float = 0.05  # THD of the pin ripple (fraction) above which to act
    distortion_action: str = "flag"
    model_mismatch_db: float = 2.0  # |measured/model pin ripple| in dB above which to act
    model_mismatch_action: str = "flag"

    def action(self, rule: str) -> str:
        """'flag' or 'stop' for one of WATCH_RULES."""
        actions = {
            "current_limit": self.current_limit,
            "pin_dc": self.pin_dc,
            "distortion": self.distortion_action,
            "model_mismatch": self.model_mismatch_action,
        }
        if rule not in actions:
            raise ValueError(f"no watch rule named {rule!r}; rules: {', '.join(WATCH_RULES)}")
        return actions[rule]


@dataclass(frozen=True, eq=False)
class LinearityCheck:
    """Repeat chosen planned frequencies at other ripple levels (factors x the planned one);
    rejection should agree within ``tolerance_db``."""

    frequencies: np.ndarray  # Hz, each one of the plan's frequencies
    factors: tuple[float, ...] = (0.5, 2.0)
    tolerance_db: float = 0.5


@dataclass(frozen=True, eq=False)
class FloorCheck:
    """Generator-off captures to see the noise floor: at every point, or at chosen ones."""

    every_point: bool
    frequencies: np.ndarray  # Hz, each one of the plan's frequencies (empty when every_point)


@dataclass(frozen=True, eq=False)
class Sweep:
    """The exact points in run order; arrays of equal length."""

    index: np.ndarray  # int, point id 0..n-1 in run order
    frequency: np.ndarray  # Hz
    ripple_peak: np.ndarray  # V peak at the device pin
    dc_level: np.ndarray  # V
    load_current: np.ndarray  # A, nan where the plan has no load axis
    ripple_convention: tuple[str, ...]  # "pp", "pk" or "rms" as written, per point

    def __len__(self) -> int:
        return int(self.index.size)


@dataclass(frozen=True, eq=False)
class PointValues:
    """The planned points' values in run order (Plan.point_values), arrays of equal length."""

    frequency: np.ndarray  # Hz
    ripple_peak: np.ndarray  # V peak at the device pin
    dc_level: np.ndarray  # V
    load_current: np.ndarray  # A, nan where the plan has no load axis

    def __len__(self) -> int:
        return int(self.frequency.size)


@dataclass(frozen=True, eq=False)
class Plan:
    """A validated plan file."""

    source: str
    text: str
    text_hash: str  # sha256 of text
    title: str
    notes: str
    operator: str
    axes: tuple[str, ...]  # run order, outermost first
    frequencies: np.ndarray  # Hz, sorted, unique
    ripples: tuple[Amplitude, ...]  # at the device pin
    dc_levels: np.ndarray  # V, in the order written
    load_currents: np.ndarray | None  # A, None when the plan has no load axis
    settle: SettleRule
    capture: CaptureRules
    device: DeviceLimits
    mask: Mask | None
    watch: WatchRules
    linearity: LinearityCheck | None = None
    floor: FloorCheck | None = None
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def device_name(self) -> str:
        """The device's description as written (plan key device.name)."""
        return self.device.name

    def axis_values(self, axis: str) -> np.ndarray:
        """The values stepped on one axis (ripple: peak volts)."""
        if axis == "frequency":
            return self.frequencies
        if axis == "ripple":
            return np.array([r.peak for r in self.ripples])
        if axis == "dc":
            return self.dc_levels
        if axis == "load" and self.load_currents is not None:
            return self.load_currents
        raise ValueError(f"the plan has no {axis!r} axis")

    @property
    def point_count(self) -> int:
        return math.prod(self.axis_values(axis).size for axis in self.axes)

    def point_values(self) -> PointValues:
        """The values of expand(), in the same run order, as four arrays only (no point
        ids or per-point convention names: what `check` needs at a million points)."""
        counts = [self.axis_values(axis).size for axis in self.axes]
        n = math.prod(counts)

        def column(axis: str, values: np.ndarray) -> np.ndarray:
            k = self.axes.index(axis)
            inner = math.prod(counts[k + 1 :])
            outer = math.prod(counts[:k])
            return np.tile(np.repeat(np.asarray(values, dtype=float), inner), outer)

        if "load" in self.axes and self.load_currents is not None:
            load = column("load", self.load_currents)
        else:
            load = np.full(n, np.nan)
        return PointValues(
            frequency=column("frequency", self.frequencies),
            ripple_peak=column("ripple", np.array([r.peak for r in self.ripples])),
            dc_level=column("dc", self.dc_levels),
            load_current=load,
        )

    def expand(self) -> Sweep:
        """Every point in run order: the first axis changes slowest, the last fastest."""
        counts = [self.axis_values(axis).size for axis in self.axes]
        grid = np.indices(counts).reshape(len(counts), -1)
        position = {axis: grid[k] for k, axis in enumerate(self.axes)}
        n = grid.shape[1]
        ripple_i = position["ripple"]
        peaks = np.array([r.peak for r in self.ripples])
        conventions = tuple(self.ripples[int(i)].convention for i in ripple_i)
        if "load" in position and self.load_currents is not None:
            load = self.load_currents[position["load"]]
        else:
            load = np.full(n, np.nan)
        return Sweep(
            index=np.arange(n, dtype=np.int64),
            frequency=self.frequencies[position["frequency"]].astype(float),
            ripple_peak=peaks[ripple_i].astype(float),
            dc_level=self.dc_levels[position["dc"]].astype(float),
            load_current=np.asarray(load, dtype=float),
            ripple_convention=conventions,
        )


# -- reading -------------------------------------------------------------------------------
def load_plan(path: str | Path) -> Plan:
    """Read and validate a plan file."""
    text, data = read_toml(path)
    return parse_plan(data, str(path), text)


def parse_plan(data: dict[str, Any], source: str, text: str) -> Plan:
    """Validate a parsed plan TOML table into a Plan."""
    top = Section(data, source)
    _only(
        top,
        (
            "title",
            "operator",
            "notes",
            "device",
            "sweep",
            "settle",
            "capture",
            "watch",
            "mask",
            "linearity",
            "floor",
        ),
    )
    title = top.text("title", default=Path(source).stem)
    operator = top.text("operator", default="")
    notes = top.text("notes", default="")
    device = _device(_table(top, "device"))
    sweep = _table(top, "sweep")
    frequencies, dc_levels, ripples, loads, axes = _sweep(sweep)
    if loads is not None and device.max_load_current is not None:
        over = loads[loads > device.max_load_current * (1 + 1e-9)]
        if over.size:
            raise sweep.error(
                "load",
                f"{format_si(float(over[0]), 'A')} is above device.max_load "
                f"({format_si(device.max_load_current, 'A')})",
            )
    settle = _settle(_table(top, "settle", required=False))
    capture = _capture(_table(top, "capture", required=False))
    watch = _watch(_table(top, "watch", required=False))
    mask_section = _table(top, "mask", required=False)
    mask = _mask(mask_section) if mask_section is not None else None
    linearity_section = _table(top, "linearity", required=False)
    linearity = (
        _linearity(linearity_section, frequencies) if linearity_section is not None else None
    )
    floor_section = _table(top, "floor", required=False)
    floor = _floor(floor_section, frequencies) if floor_section is not None else None
    top.done()
    return Plan(
        source=source,
        text=text,
        text_hash=hashlib.sha256(text.encode("utf-8")).hexdigest(),
        title=title,
        notes=notes,
        operator=operator,
        axes=axes,
        frequencies=frequencies,
        ripples=ripples,
        dc_levels=dc_levels,
        load_currents=loads,
        settle=settle,
        capture=capture,
        device=device,
        mask=mask,
        watch=watch,
        linearity=linearity,
        floor=floor,
    )


# -- helpers: keys, lists, numbers ---------------------------------------------------------
def _only(section: Section, allowed: Iterable[str]) -> None:
    """Refuse keys nobody reads, before reading, so the nearest valid name is suggested."""
    names = tuple(allowed)
    for key in section.data:
        if key not in names:
            raise section.error(key, unknown_key_message(key, names))


def _table(section: Section, key: str, required: bool = True) -> Any:
    """A sub-table (a FileKeyError, not an assert, when it is missing or not a table)."""
    if key not in section.data:
        if required:
            raise section.error(key, "missing (required table)")
        section.raw(key, None)
        return None
    return section.section(key)


def _list_section(section: Section, key: str) -> Section:
    """A Section whose key_path(i) reads 'parent.key[i]' (for errors at list items)."""
    return Section({}, section.source, section.key_path(key))


def _finite_number(section: Section, key: str, default: float, low: float, high: float) -> float:
    value = section.number(key, default=default)
    if not math.isfinite(value):
        raise section.error(key, f"expected a finite number, got {value}")
    if not low <= value <= high:
        raise section.error(key, f"{value:g} is outside the sensible range {low:g} to {high:g}")
    return float(value)


def _clean(values: np.ndarray) -> np.ndarray:
    """Round to 12 significant digits so that grid points like 100 Hz come out exact."""
    return np.array([float(f"{v:.{_CLEAN_DIGITS}g}") for v in values], dtype=float)


def _unique_sorted(values: Sequence[float] | np.ndarray) -> np.ndarray:
    """Sorted, with values equal within 1e-9 relative merged (the first one kept)."""
    ordered = np.sort(np.asarray(values, dtype=float))
    if ordered.size == 0:
        return ordered
    keep = [0]
    for i in range(1, ordered.size):
        if ordered[i] - ordered[keep[-1]] > 1e-9 * abs(ordered[i]):
            keep.append(i)
    return ordered[keep]


# -- the sweep -----------------------------------------------------------------------------
def _sweep(
    sweep: Section,
) -> tuple[np.ndarray, np.ndarray, tuple[Amplitude, ...], np.ndarray | None, tuple[str, ...]]:
    _only(sweep, ("order", "frequency", "ripple", "dc", "load"))
    frequencies = _frequencies(sweep)
    ripples = _ripples(sweep)
    dc_levels = _levels(sweep, "dc", "V", minimum_exclusive=True)
    loads = _levels(sweep, "load", "A", minimum_exclusive=False) if sweep.has("load") else None
    sweep.raw("load", None)
    present = tuple(a for a in AXES if a != "load" or loads is not None)
    if sweep.has("order"):
        axes = _order(sweep, present)
    else:
        sweep.raw("order", None)
        axes = tuple(a for a in DEFAULT_ORDER if a in present)
    count = frequencies.size * len(ripples) * dc_levels.size * (1 if loads is None else loads.size)
    if count > MAX_POINTS:
        raise FileKeyError(
            sweep.source, sweep.path, f"expands to {count:,} points; at most {MAX_POINTS:,}"
        )
    sweep.done()
    return frequencies, dc_levels, ripples, loads, axes


def _order(sweep: Section, present: tuple[str, ...]) -> tuple[str, ...]:
    items = sweep.items_list("order", allow_scalar=False)
    where = _list_section(sweep, "order")
    axes: list[str] = []
    for i, item in enumerate(items):
        if not isinstance(item, str) or item not in AXES:
            raise where.error(i, f"{item!r} is not an axis; axes: {', '.join(AXES)}")
        if item not in present:
            raise where.error(i, f"'{item}' is listed but the plan gives no sweep.{item}")
        if item in axes:
            raise where.error(i, f"'{item}' is listed twice")
        axes.append(item)
    missing = [a for a in present if a not in axes]
    if missing:
        raise sweep.error(
            "order",
            f"must list every axis of the sweep, outermost first; missing: {', '.join(missing)}",
        )
    return tuple(axes)


def _ripples(sweep: Section) -> tuple[Amplitude, ...]:
    items = sweep.items_list("ripple")
    where = _list_section(sweep, "ripple")
    ripples: list[Amplitude] = []
    for i, item in enumerate(items):
        amplitude = where.parse_amplitude_value(item, i)
        where.check_range(i, amplitude.peak, item, PLAN_RANGES["sweep.ripple"])
        if any(abs(amplitude.peak - r.peak) <= 1e-9 * r.peak for r in ripples):
            raise where.error(i, f"'{item}' is the same amplitude as an earlier one")
        ripples.append(amplitude)
    return tuple(ripples)


def _levels(sweep: Section, key: str, dimension: str, minimum_exclusive: bool) -> np.ndarray:
    """DC levels (V, > 0) or load currents (A, >= 0): a list, one value, or a linear range."""
    within = PLAN_RANGES[f"sweep.{key}"]
    value = sweep.raw(key)
    if isinstance(value, dict):
        band = Section(value, sweep.source, sweep.key_path(key))
        levels = _linear_range(band, dimension, positive=minimum_exclusive, within=within)
    else:
        items = sweep.items_list(key)
        where = _list_section(sweep, key)
        numbers: list[float] = []
        for i, item in enumerate(items):
            number = where.parse_value(item, dimension, i)
            if minimum_exclusive and not number > 0:
                raise where.error(i, f"must be greater than zero, got {item!r}")
            if number < 0:
                raise where.error(i, f"must not be negative, got {item!r}")
            where.check_range(i, number, item, within)
            if any(abs(number - n) <= 1e-9 * max(abs(n), 1e-30) for n in numbers):
                raise where.error(i, f"{item!r} is listed twice")
            numbers.append(number)
        levels = np.array(numbers, dtype=float)
    return levels


def _linear_range(
    band: Section, dimension: str, positive: bool, within: Range | None = None
) -> np.ndarray:
    """{from, to, step} or {from, to, points}: evenly spaced, both ends included."""
    _only(band, ("from", "to", "step", "points"))
    start = band.quantity("from", dimension, positive=positive, nonnegative=True, within=within)
    stop = band.quantity("to", dimension, positive=positive, nonnegative=True, within=within)
    if stop < start:
        raise band.error("to", f"{format_si(stop, _unit(dimension))} is below from")
    if band.has("step") == band.has("points"):
        raise FileKeyError(band.source, band.path, "give either step or points (one of them)")
    if band.has("step"):
        step = band.quantity("step", dimension, positive=True)
        count_f = (stop - start) / step
        if count_f + 1 > MAX_FREQUENCIES:
            raise band.error(
                "step", f"gives {count_f + 1:,.0f} values; at most {MAX_FREQUENCIES:,}"
            )
        n = math.floor(count_f + 1e-9) + 1
        values = start + step * np.arange(n)
        if stop - values[-1] > 1e-9 * max(stop, step):
            values = np.append(values, stop)
        band.raw("points", None)
    else:
        n = band.integer("points", minimum=2, maximum=MAX_FREQUENCIES)
        values = np.linspace(start, stop, n)
        band.raw("step", None)
    band.done()
    return _unique_sorted(_clean(values))


def _unit(dimension: str) -> str:
    return {"ohm": "Ω"}.get(dimension, dimension)


def _frequencies(sweep: Section) -> np.ndarray:
    """sweep.frequency: one band table, a frequency, or a list of frequencies and band tables
    (the union of all of them); sorted, duplicates removed."""
    value = sweep.raw("frequency")
    parts = value if isinstance(value, list) else [value]
    if not parts:
        raise sweep.error("frequency", "an empty list; give at least one frequency or band")
    collected: list[float] = []
    for i, part in enumerate(parts):
        path = sweep.key_path("frequency") if not isinstance(value, list) else None
        where = _list_section(sweep, "frequency")
        if isinstance(part, dict):
            band_path = path if path is not None else where.key_path(i)
            collected.extend(_band(Section(part, sweep.source, band_path)))
        elif path is not None:
            collected.append(
                sweep.quantity("frequency", "Hz", positive=True, within=FREQUENCY_RANGE)
            )
        else:
            frequency = where.parse_value(part, "Hz", i)
            if not frequency > 0:
                raise where.error(i, f"a frequency must be greater than zero, got {part!r}")
            collected.append(where.check_range(i, frequency, part, FREQUENCY_RANGE))
        if len(collected) > MAX_FREQUENCIES:
            raise sweep.error("frequency", f"more than {MAX_FREQUENCIES:,} frequencies")
    return _unique_sorted(collected)


def _band(band: Section) -> list[float]:
    """One band: {from, to, per_decade} (log: from x 10^(k/per_decade), and to), {from, to,
    step} or {from, to, points} (linear), or {at = [...]} (a list)."""
    _only(band, ("from", "to", "per_decade", "step", "points", "at"))
    if band.has("at"):
        for other in ("from", "to", "per_decade", "step", "points"):
            if band.has(other):
                raise band.error(other, "a band with 'at' lists its frequencies; drop this key")
        items = band.items_list("at")
        where = _list_section(band, "at")
        listed: list[float] = []
        for i, item in enumerate(items):
            frequency = where.parse_value(item, "Hz", i)
            if not frequency > 0:
                raise where.error(i, f"a frequency must be greater than zero, got {item!r}")
            listed.append(where.check_range(i, frequency, item, FREQUENCY_RANGE))
        return listed
    kinds = [k for k in ("per_decade", "step", "points") if band.has(k)]
    if len(kinds) != 1:
        raise FileKeyError(
            band.source,
            band.path,
            "give exactly one of per_decade (log), step or points (linear), or list them with at",
        )
    if kinds[0] != "per_decade":
        return list(_linear_range(band, "Hz", positive=True, within=FREQUENCY_RANGE))
    start = band.quantity("from", "Hz", positive=True, within=FREQUENCY_RANGE)
    stop = band.quantity("to", "Hz", positive=True, within=FREQUENCY_RANGE)
    if stop < start:
        raise band.error("to", f"{format_si(stop, 'Hz')} is below from ({format_si(start, 'Hz')})")
    per_decade = _finite_number(band, "per_decade", default=math.nan, low=1.0, high=10_000.0)
    decades = math.log10(stop / start)
    count_f = decades * per_decade
    if count_f + 1 > MAX_FREQUENCIES:
        raise band.error(
            "per_decade", f"gives {count_f + 1:,.0f} frequencies; at most {MAX_FREQUENCIES:,}"
        )
    # A grid anchored at `from` (a decade start keeps every decade point, whatever `to` is);
    # `to` is appended when it is off the grid, so the last interval may be shorter.
    steps = math.floor(count_f + 1e-9)
    values = _clean(start * 10.0 ** (np.arange(steps + 1) / per_decade))
    values[0] = start
    if stop > values[-1] * (1 + 1e-9):
        values = np.append(values, stop)
    band.done()
    return list(values)


# -- the other tables ----------------------------------------------------------------------
def _device(section: Section) -> DeviceLimits:
    _only(section, ("name", "absolute_max", "min_operating", "max_load", "gain"))
    name = section.text("name", default="")
    absolute_max = section.quantity("absolute_max", "V", within=PLAN_RANGES["device.absolute_max"])
    min_operating = section.quantity(
        "min_operating", "V", nonnegative=True, within=PLAN_RANGES["device.min_operating"]
    )
    if min_operating >= absolute_max:
        raise section.error(
            "min_operating",
            f"{format_si(min_operating, 'V')} is not below absolute_max "
            f"({format_si(absolute_max, 'V')})",
        )
    max_load = section.quantity(
        "max_load", "A", default=None, within=PLAN_RANGES["device.max_load"]
    )
    gain = _gain_db(section, "gain", section.raw("gain", None))
    section.done()
    return DeviceLimits(absolute_max, min_operating, max_load, name, gain)


def _gain_db(section: Section, key: str, value: Any) -> float | None:
    """The device's gain as written: '20 dB', a ratio (10, '10 V/V'); None when absent."""
    if value is None:
        return None
    text = value.strip() if isinstance(value, str) else None
    if text is not None and text.lower().endswith("db"):
        gain = section.parse_value(text, "dB", key)
        if abs(gain) > 200:
            raise section.error(key, f"{value!r} is not a plausible gain (within ±200 dB)")
        return gain
    if text is not None and text.endswith("V/V"):
        text = text[:-3].strip()
    try:
        ratio = float(text if text is not None else value) if not isinstance(value, bool) else -1
    except (TypeError, ValueError):
        ratio = math.nan
    if not (math.isfinite(ratio) and 1e-10 <= ratio <= 1e10):
        raise section.error(
            key,
            f"expected the device's gain as '20 dB' or a positive ratio such as 10 or "
            f"'10 V/V', got {value!r}",
        )
    return 20.0 * math.log10(ratio)


def _settle(section: Section | None) -> SettleRule:
    if section is None:
        return SettleRule()
    _only(section, ("rule", "wait", "time_constants", "after_operating_point"))
    # a plan written for the fixed rule (time_constants given, no rule) keeps it
    written = "time_constants" in section.data
    rule = section.text(
        "rule", default="time-constants" if written else "transient", choices=SETTLE_RULES
    )
    if rule == "transient" and written:
        raise section.error(
            "time_constants",
            'is used only with rule = "time-constants"; rule "transient" waits until the '
            "injector's transient after each change is under a tenth of the target "
            'uncertainty (remove time_constants, or set rule = "time-constants")',
        )
    fixed = section.quantity(
        "wait", "s", default=0.0, nonnegative=True, within=PLAN_RANGES["settle.wait"]
    )
    constants = _finite_number(section, "time_constants", default=5.0, low=0.0, high=100.0)
    after = section.quantity(
        "after_operating_point",
        "s",
        default=0.0,
        nonnegative=True,
        within=PLAN_RANGES["settle.after_operating_point"],
    )
    if rule == "time-constants" and fixed == 0 and constants == 0:
        raise FileKeyError(
            section.source,
            section.path,
            "wait and time_constants are both zero; the injector needs time to settle",
        )
    section.done()
    return SettleRule(fixed, constants, after, rule)


def _capture(section: Section | None) -> CaptureRules:
    if section is None:
        return CaptureRules()
    _only(
        section,
        ("min_cycles", "max_time", "target_uncertainty", "max_averages", "frequency_tolerance"),
    )
    tolerance = section.raw("frequency_tolerance", None)
    rules = CaptureRules(
        min_cycles=section.integer("min_cycles", default=10, minimum=1, maximum=1_000_000),
        max_time_s=section.quantity(
            "max_time", "s", default=10.0, positive=True, within=PLAN_RANGES["capture.max_time"]
        ),
        target_uncertainty_db=section.quantity(
            "target_uncertainty",
            "dB",
            default=0.1,
            positive=True,
            within=PLAN_RANGES["capture.target_uncertainty"],
        ),
        max_averages=section.integer("max_averages", default=64, minimum=1, maximum=1_000_000),
        frequency_tolerance=(
            1e-3 if tolerance is None else _tolerance(section, "frequency_tolerance", tolerance)
        ),
    )
    section.done()
    return rules


def _tolerance(section: Section, key: str, value: Any) -> float:
    """'0.1 %' -> 0.001; '0 %' keeps every frequency exactly as planned; at most 10 %."""
    text = value.strip() if isinstance(value, str) else ""
    try:
        number = float(text[:-1]) if text.endswith("%") else math.nan
    except ValueError:
        number = math.nan
    if not (math.isfinite(number) and 0 <= number <= 10):
        raise section.error(
            key, f"expected a percentage from '0 %' to '10 %' such as '0.1 %', got {value!r}"
        )
    return number / 100.0


def _action(section: Section, key: str, value: Any) -> str:
    if not isinstance(value, str) or value not in ACTIONS:
        raise section.error(key, f"expected 'flag' or 'stop', got {value!r}")
    return value


def _percent(section: Section, key: str, value: Any) -> float:
    """'5 %' -> 0.05."""
    text = value.strip() if isinstance(value, str) else ""
    if not text.endswith("%"):
        raise section.error(key, f"expected a percentage such as '5 %', got {value!r}")
    try:
        number = float(text[:-1])
    except ValueError:
        raise section.error(key, f"expected a percentage such as '5 %', got {value!r}") from None
    if not (math.isfinite(number) and 0 < number <= 100):
        raise section.error(key, f"must be above 0 % and at most 100 %, got {value!r}")
    return number / 100.0


def _threshold_rule(
    section: Section, key: str, default: tuple[float, str], parse: Any
) -> tuple[float, str]:
    """A rule written as a threshold ('5 %') or as { above = '5 %', then = 'stop' }."""
    value = section.raw(key, None)
    if value is None:
        return default
    if isinstance(value, dict):
        rule = Section(value, section.source, section.key_path(key))
        _only(rule, ("above", "then"))
        threshold = parse(rule, "above", rule.raw("above", default[0]))
        action = _action(rule, "then", rule.raw("then", default[1]))
        rule.done()
        return threshold, action
    return parse(section, key, value), default[1]


def _db_threshold(section: Section, key: str, value: Any) -> float:
    level = section.parse_value(value, "dB", key)
    if not level > 0:
        raise section.error(key, f"must be greater than 0 dB, got {value!r}")
    return section.check_range(key, level, value, PLAN_RANGES["watch.model_mismatch"])


def _watch(section: Section | None) -> WatchRules:
    defaults = WatchRules()
    if section is None:
        return defaults
    _only(section, WATCH_RULES)
    current = _action(
        section, "current_limit", section.raw("current_limit", defaults.current_limit)
    )
    pin_dc = _action(section, "pin_dc", section.raw("pin_dc", defaults.pin_dc))
    distortion, distortion_action = _threshold_rule(
        section, "distortion", (defaults.distortion, defaults.distortion_action), _percent
    )
    mismatch, mismatch_action = _threshold_rule(
        section,
        "model_mismatch",
        (defaults.model_mismatch_db, defaults.model_mismatch_action),
        _db_threshold,
    )
    section.done()
    return WatchRules(current, pin_dc, distortion, distortion_action, mismatch, mismatch_action)


def _mask(section: Section) -> Mask:
    _only(section, ("name", "points"))
    name = section.text("name", default="")
    items = section.items_list("points", allow_scalar=False)
    where = _list_section(section, "points")
    frequencies: list[float] = []
    limits: list[float] = []
    for i, item in enumerate(items):
        if not (isinstance(item, list) and len(item) == 2):
            raise where.error(i, f'expected a pair such as ["10 kHz", "40 dB"], got {item!r}')
        pair = Section({}, section.source, where.key_path(i))
        frequency = pair.parse_value(item[0], "Hz", 0)
        if not frequency > 0:
            raise pair.error(0, f"a frequency must be greater than zero, got {item[0]!r}")
        pair.check_range(0, frequency, item[0], FREQUENCY_RANGE)
        if frequencies and frequency <= frequencies[-1]:
            raise pair.error(0, "mask frequencies must increase from one point to the next")
        frequencies.append(frequency)
        limit = pair.parse_value(item[1], "dB", 1)
        limits.append(pair.check_range(1, limit, item[1], PLAN_RANGES["mask.points"]))
    if len(frequencies) < 2:
        raise section.error(
            "points", "a mask needs at least two points (for a flat limit repeat the dB value)"
        )
    section.done()
    return Mask(np.array(frequencies), np.array(limits), name)


def _planned(section: Section, key: str, planned: np.ndarray) -> np.ndarray:
    """Frequencies named at ``key`` that must be among the planned ones (within 0.1 %)."""
    items = section.items_list(key)
    where = _list_section(section, key)
    chosen: list[float] = []
    for i, item in enumerate(items):
        frequency = where.parse_value(item, "Hz", i)
        nearest = (
            planned[int(np.argmin(np.abs(np.log(planned) - math.log(frequency))))]
            if (frequency > 0)
            else planned[0]
        )
        if not (frequency > 0 and abs(nearest / frequency - 1) <= MATCH_TOLERANCE):
            raise where.error(
                i,
                f"{item!r} is not one of the planned frequencies; the nearest is "
                f"{format_si(float(nearest), 'Hz', 6)}",
            )
        chosen.append(float(nearest))
    return _unique_sorted(chosen)


def _linearity(section: Section, planned: np.ndarray) -> LinearityCheck:
    _only(section, ("at", "factors", "tolerance"))
    frequencies = _planned(section, "at", planned)
    factors_raw = section.items_list("factors", default=[0.5, 2.0])
    where = _list_section(section, "factors")
    factors: list[float] = []
    for i, item in enumerate(factors_raw):
        factor = where.parse_value(item, "", i)
        if not (0 < factor <= 100) or abs(factor - 1) < 1e-9:
            raise where.error(i, f"a factor must be above 0, at most 100 and not 1, got {item!r}")
        factors.append(factor)
    tolerance = section.quantity(
        "tolerance", "dB", default=0.5, positive=True, within=PLAN_RANGES["linearity.tolerance"]
    )
    section.done()
    return LinearityCheck(frequencies, tuple(factors), tolerance)


def _floor(section: Section, planned: np.ndarray) -> FloorCheck:
    _only(section, ("at",))
    value = section.raw("at")
    if value == "every point":
        section.done()
        return FloorCheck(True, np.array([], dtype=float))
    if isinstance(value, str) and not any(ch.isdigit() for ch in value):
        raise section.error("at", f"expected 'every point' or a list of frequencies, got {value!r}")
    frequencies = _planned(section, "at", planned)
    section.done()
    return FloorCheck(False, frequencies)
