"""The allowed range of every quantity an engineer writes in a plan or a bench file.

A value outside its range is refused when the file is read, with the file, the key, the
value as written and the range, so that a typo ("1e9 s", "10 mHz" for 10 MHz, "1e-12 V/s")
can never hang or crash a run after the bench is powered. The ranges are deliberately
wide: they catch values no bench could mean, not values that are merely unusual (those are
the feasibility check's business). The contributor guide lists them ("Files people
write").
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from benchseq.units import format_si

HOUR = 3600.0
DAY = 86_400.0
LONGEST_WAIT_S = HOUR  # no single wait of a run (settling, bias filter, one DC ramp) is longer


@dataclass(frozen=True)
class Range:
    """``low`` to ``high`` in SI units; ``low_open``: the value must be strictly above low."""

    low: float
    high: float
    unit: str  # the SI unit shown in messages ("s", "V/s", "Hz", "Ω", "F", "V", "A", "dB", "")
    low_open: bool = False

    def contains(self, value: float) -> bool:
        if not math.isfinite(value) or value > self.high:
            return False
        return value > self.low if self.low_open else value >= self.low

    def describe(self) -> str:
        """'0 s to 1 h', 'above 0 V, at most 1 kV'."""
        low, high = format_limit(self.low, self.unit), format_limit(self.high, self.unit)
        if self.low_open:
            return f"above {low}, at most {high}"
        return f"{low} to {high}"


def format_limit(value: float, unit: str) -> str:
    """A limit as an engineer reads it: times in s, min, h or days; others with SI prefixes."""
    if unit == "s" and value >= 60.0:
        for size, name in ((DAY, "day"), (HOUR, "h"), (60.0, "min")):
            if value >= size:
                count = value / size
                plural = "s" if name == "day" and count != 1 else ""
                return f"{count:.3g} {name}{plural}"
    if unit == "dB":
        return f"{value:g} dB"
    if unit == "":
        return f"{value:g}"
    return format_si(value, unit, 3)


# -- plan files ------------------------------------------------------------------------------
PLAN_RANGES: dict[str, Range] = {
    "device.absolute_max": Range(0.0, 1000.0, "V", low_open=True),
    "device.min_operating": Range(0.0, 1000.0, "V"),
    "device.max_load": Range(0.0, 100.0, "A", low_open=True),
    "sweep.frequency": Range(1e-3, 10e9, "Hz"),
    "sweep.ripple": Range(1e-6, 100.0, "Vpk"),  # at the pin, whatever convention is written
    "sweep.dc": Range(0.0, 1000.0, "V", low_open=True),
    "sweep.load": Range(0.0, 100.0, "A"),
    "settle.wait": Range(0.0, HOUR, "s"),
    "settle.after_operating_point": Range(0.0, HOUR, "s"),
    "capture.max_time": Range(1e-3, HOUR, "s"),
    "capture.target_uncertainty": Range(1e-3, 20.0, "dB"),
    "watch.model_mismatch": Range(0.0, 60.0, "dB", low_open=True),
    "mask.points": Range(-100.0, 300.0, "dB"),  # the rejection limits; frequencies as sweep
    "linearity.tolerance": Range(0.0, 20.0, "dB", low_open=True),
}

# -- bench files -----------------------------------------------------------------------------
_RESISTOR = Range(1e-3, 1e9, "Ω")
_CAPACITOR = Range(1e-12, 1.0, "F")
_RAIL = Range(-1000.0, 1000.0, "V")

BENCH_RANGES: dict[str, Range] = {
    "timeout": Range(1e-3, 600.0, "s"),  # any instrument's I/O timeout
    "generator.source_resistance": Range(0.0, 1e6, "Ω"),
    "generator.max_amplitude": Range(1e-6, 1000.0, "Vpp"),  # displayed
    "generator.min_amplitude": Range(1e-6, 1000.0, "Vpp"),
    "generator.max_frequency": Range(1.0, 100e9, "Hz"),
    "supply.current_limit": Range(1e-6, 100.0, "A"),
    "supply.overvoltage_protection": Range(0.0, 1000.0, "V", low_open=True),
    "supply.safe_level": Range(0.0, 1000.0, "V"),
    "supply.ramp_rate": Range(0.01, 1e6, "V/s"),
    "scope.probe": Range(1e-3, 1e4, ""),
    "scope.bandwidth_limit": Range(1e3, 100e9, "Hz"),
    "load.max_current": Range(0.0, 100.0, "A", low_open=True),
    "injector.input_resistor": Range(1.0, 1e9, "Ω"),
    "injector.coupling_capacitor": _CAPACITOR,
    "injector.feedback_resistor": Range(1.0, 1e9, "Ω"),
    "injector.bias_resistor": Range(1.0, 1e9, "Ω"),
    "injector.bias_capacitor": _CAPACITOR,
    "injector.opamp.open_loop_gain": Range(1.0, 1e9, "", low_open=True),  # ratio (180 dB)
    "injector.opamp.gain_bandwidth": Range(1e3, 100e9, "Hz"),
    "injector.opamp.slew_rate": Range(1.0, 1e11, "V/s"),
    "injector.opamp.output_resistance": Range(0.0, 10e3, "Ω"),
    "injector.opamp.current_limit": Range(1e-6, 100.0, "A"),
    "injector.opamp.output_low": _RAIL,
    "injector.opamp.output_high": _RAIL,
    "pin.capacitance": _CAPACITOR,
    "pin.capacitor_esr": Range(0.0, 1e3, "Ω"),
    "pin.load_current": Range(0.0, 100.0, "A"),
    "pin.load_resistance": _RESISTOR,
    "after_run.timeout": Range(1.0, 600.0, "s"),
}


def range_table() -> list[tuple[str, str, str]]:
    """(file, key, allowed range) rows for documentation."""
    rows = [("plan", key, r.describe()) for key, r in PLAN_RANGES.items()]
    rows += [("bench", key, r.describe()) for key, r in BENCH_RANGES.items()]
    return rows
