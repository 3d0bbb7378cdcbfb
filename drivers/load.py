"""The electronic load role, constant-current mode."""

from __future__ import annotations

from benchseq.drivers.instrument import Instrument


class Load(Instrument):
    """Amperes and volts; the input is off until input(True)."""

    role = "load"

    def set_current(self, amperes: float) -> None:
        """Constant-current mode (if the profile has the command), then the current (A)."""
        if self.profile.has("mode_current") and "mode" not in self._state:
            self.configure("mode_current", slot="mode")
        self.configure("current", float(amperes), query_key="current_query")

    def input(self, on: bool) -> None:
        self.switch("input", on)

    def input_is_on(self) -> bool:
        return self.switched_on("input")

    def measure_current(self) -> float:
        return float(self.ask("measure_current"))

    def measure_voltage(self) -> float:
        return float(self.ask("measure_voltage"))
