"""The DC supply role: set-point, current limit, over-voltage protection, read-backs."""

from __future__ import annotations

from benchseq.drivers.instrument import Instrument, parse_bool, parse_int


class Supply(Instrument):
    """Volts and amperes. Set the limits before the output is switched on."""

    role = "supply"

    def set_voltage(self, volts: float) -> None:
        self.configure("voltage", float(volts), query_key="voltage_query")

    def set_current_limit(self, amperes: float) -> None:
        self.configure("current_limit", float(amperes), query_key="current_limit_query")

    def set_overvoltage_protection(self, volts: float) -> None:
        """Protection level (V), then protection on."""
        self.configure("overvoltage_level", float(volts), query_key="overvoltage_level_query")
        self.configure("overvoltage_on", slot="overvoltage_state")

    def output(self, on: bool) -> None:
        self.switch("output", on)

    def output_is_on(self) -> bool:
        return self.switched_on("output")

    def measure_voltage(self) -> float:
        """Output voltage as measured by the supply (V)."""
        return float(self.ask("measure_voltage"))

    def measure_current(self) -> float:
        """Output current as measured by the supply (A)."""
        return float(self.ask("measure_current"))

    def is_current_limited(self) -> bool:
        """True when the questionable-status CURRent bit is set (the supply is limiting)."""
        mask = self.profile.integers.get("current_limited_mask", 2)
        return bool(self.ask("questionable_query", parse_int) & mask)

    def overvoltage_tripped(self) -> bool:
        return bool(self.ask("overvoltage_tripped_query", parse_bool))
