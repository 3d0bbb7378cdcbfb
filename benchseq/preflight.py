"""Everything a run will need, checked before anything is switched on or written.

``preflight(plan, bench)`` reads what the two files point to and compares them, without
opening a connection: each instrument's address is a VISA resource string, its profile
exists and parses for its role, its ``driver_class`` imports and is a subclass of the role's
class; the calibration file loads; ``lab.simulation`` names a scenario that loads; the
plan's axes are ones the bench can drive; the supply's safe level is within the device's
limits. ``check`` and ``run`` both call it, so a file ``check`` accepts does not fail in
``run`` after the result file exists. Every refusal is a FileKeyError naming the file and
key; what is allowed but unwise is listed by ``plan_bench_warnings`` (shown by ``check``).
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

from benchseq.bench import SIM_ADDRESS_PREFIX, Bench, InstrumentSpec
from benchseq.errors import BadInput, FileKeyError
from benchseq.ranges import LONGEST_WAIT_S, format_limit
from benchseq.units import format_si

if TYPE_CHECKING:
    from benchseq.plan import Plan


def preflight(plan: Plan, bench: Bench) -> None:
    """Refuse (FileKeyError) what a run could not do (warnings: plan_bench_warnings)."""
    check_bench_for_run(bench)
    check_plan_on_bench(plan, bench)
    check_waits(plan, bench)


def check_bench_for_run(bench: Bench) -> None:
    """The bench file's references: addresses, profiles, driver classes, calibration, scenario."""
    for role, spec in bench.instruments.items():
        _check_address(bench, role, spec)
        _check_profile(bench, role, spec)
        _check_driver_class(bench, role, spec)
    _check_calibration(bench)
    _check_simulation(bench)


def check_plan_on_bench(plan: Plan, bench: Bench) -> None:
    """What the plan asks of this bench: its axes need the roles, its limits bound the bench."""
    if plan.load_currents is not None and "load" not in bench.instruments:
        raise FileKeyError(
            plan.source,
            "sweep.load",
            f"the plan steps the load current, but the bench ({bench.source}) has no electronic "
            "load: add a [load] table to the bench file, or drop sweep.load from the plan",
        )
    safe = bench.supply.safe_level
    limit = plan.device.absolute_max_v
    if safe > limit:
        raise FileKeyError(
            bench.source,
            "supply.safe_level",
            f"{format_si(safe, 'V')} is above the device's absolute maximum "
            f"{format_si(limit, 'V')} ({plan.source}: device.absolute_max); a stop would leave "
            "the device above its limit. Use 0 V (output off) or a level within the limits",
        )


def check_waits(plan: Plan, bench: Bench) -> None:
    """No single wait of the run may exceed LONGEST_WAIT_S: the settling after each change
    (benchseq.settling; for the "transient" rule its longest case, a change between the
    generator's largest EMFs at the lowest planned frequency measured at the smallest
    planned ripple; for "time-constants", settle.wait + settle.time_constants x the
    injector's slowest time constant), the pin's DC
    settling after the largest DC step (Settling.dc_step; 7 Rb·Cb under "time-constants") and
    one DC ramp (from 0 V to the
    highest level at supply.ramp_rate). Each value may be in range while the product is not."""
    from benchseq.check import injector_guard
    from benchseq.injector import InjectorModel
    from benchseq.settling import Settling

    with injector_guard(bench):
        model = InjectorModel(bench.injector, bench.generator, bench.pin)
        corners = model.corners()
        settling = Settling(plan.settle, model, plan.capture.target_uncertainty_db)
        low = float(min(plan.frequencies))
        emf = 0.5 * bench.generator.max_amplitude_pp * bench.generator.emf_per_displayed
        smallest = min(r.peak for r in plan.ripples)
        settle = float(settling.change(low, emf, low, emf, smallest))
    tau = corners.slowest_time_constant_s
    longest = format_limit(LONGEST_WAIT_S, "s")
    if settle > LONGEST_WAIT_S and plan.settle.rule == "transient":
        raise FileKeyError(
            bench.source,
            "injector",
            f"after a change of the generator at {format_si(low, 'Hz', 3)} the injector's "
            f"transient would need {_duration(settle)} to fall under a tenth of the target "
            f"uncertainty, more than {longest}; check the capacitor and resistor values",
        )
    if settle > LONGEST_WAIT_S:
        raise FileKeyError(
            bench.source,
            "injector",
            f"the injector's slowest time constant is {_duration(tau)}: with {plan.source}'s "
            f"settle.time_constants = {plan.settle.time_constants:g} (and settle.wait) every "
            f"point would wait {_duration(settle)}, more than {longest}; check the capacitor and "
            "resistor values (or lower settle.time_constants)",
        )
    with injector_guard(bench):
        bias = float(settling.dc_step(float(max(plan.dc_levels)), smallest))
    if bias > LONGEST_WAIT_S and plan.settle.rule == "transient":
        raise FileKeyError(
            bench.source,
            "injector",
            f"after the DC ramp to {format_si(float(max(plan.dc_levels)), 'V')} the pin's DC "
            f"would need {_duration(bias)} to settle through the injector (bias filter Rb·Cb, "
            f"coupling capacitor), more than {longest}; check the capacitor and resistor values",
        )
    if bias > LONGEST_WAIT_S:
        raise FileKeyError(
            bench.source,
            "injector.bias_capacitor",
            f"the bias filter (Rb·Cb) needs {_duration(bias)} to settle after each DC step, "
            f"more than {longest}",
        )
    ramp = float(max(plan.dc_levels)) / bench.supply.ramp_rate
    if ramp > LONGEST_WAIT_S:
        raise FileKeyError(
            bench.source,
            "supply.ramp_rate",
            f"ramping to {format_si(float(max(plan.dc_levels)), 'V')} ({plan.source}: sweep.dc) "
            f"at {format_si(bench.supply.ramp_rate, 'V/s')} takes {_duration(ramp)}, more than "
            f"{longest}",
        )


def _duration(seconds: float) -> str:
    return format_limit(seconds, "s") if seconds >= 60 else format_si(seconds, "s", 3)


def plan_bench_warnings(plan: Plan, bench: Bench) -> list[str]:
    """Allowed but unwise combinations of this plan and bench."""
    notes = []
    protection = bench.supply.overvoltage_protection
    limit = plan.device.absolute_max_v
    if protection > limit * (1 + 1e-9):
        notes.append(
            f"{bench.source}: supply.overvoltage_protection {format_si(protection, 'V')} is above "
            f"the device's absolute maximum {format_si(limit, 'V')} ({plan.source}: "
            "device.absolute_max): a supply fault could take the pin past the device's limit "
            "before the protection trips; set it at or below the limit"
        )
    safe = bench.supply.safe_level
    if 0 < safe < plan.device.min_operating_v:
        notes.append(
            f"{bench.source}: supply.safe_level {format_si(safe, 'V')} is below the device's "
            f"minimum operating level {format_si(plan.device.min_operating_v, 'V')}: after a "
            "stop the device is powered but out of regulation"
        )
    return notes


# -- the bench's references ----------------------------------------------------------------
def _check_address(bench: Bench, role: str, spec: InstrumentSpec) -> None:
    from benchseq.visaname import AddressError, check_resource_name

    if bench.is_simulated or spec.address.upper().startswith(SIM_ADDRESS_PREFIX):
        return  # the simulated bench answers every role itself; no address is opened
    try:
        check_resource_name(spec.address)
    except AddressError as exc:
        raise FileKeyError(bench.source, f"{role}.address", str(exc)) from None


def _check_profile(bench: Bench, role: str, spec: InstrumentSpec) -> None:
    from benchseq.drivers.factory import profile_for

    try:
        profile_for(spec, bench)
    except BadInput as exc:
        raise FileKeyError(
            bench.source, f"{role}.profile", f"'{spec.profile}' cannot be used: {exc}"
        ) from None


def _check_driver_class(bench: Bench, role: str, spec: InstrumentSpec) -> None:
    from benchseq.drivers.factory import driver_class

    driver_class(spec, bench.source)  # FileKeyError naming <role>.driver_class


def _check_calibration(bench: Bench) -> None:
    if bench.scope.calibration is None:
        return
    from benchseq.calibrate import load_calibration

    try:
        load_calibration(bench.scope.calibration)
    except BadInput as exc:
        hint = ""
        if not Path(bench.scope.calibration).exists():
            hint = f" (make it with `benchseq calibrate --bench {bench.source}`, or drop the key)"
        raise FileKeyError(bench.source, "scope.calibration", f"{exc}{hint}") from None


def _check_simulation(bench: Bench) -> None:
    if bench.simulation is None:
        return
    from benchseq.sim.scenario import load_scenario

    try:
        load_scenario(bench.simulation)
    except BadInput as exc:
        raise FileKeyError(
            bench.source, "lab.simulation", f"'{bench.simulation}' cannot be used: {exc}"
        ) from None
