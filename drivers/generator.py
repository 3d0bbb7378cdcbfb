"""The function generator role: a sine of set frequency, amplitude (displayed Vpp) and offset."""

from __future__ import annotations

from benchseq.drivers.instrument import Instrument, parse_word

LOAD_MODES = {"50 ohm": "load_50_ohm", "high-z": "load_high_z"}


class Generator(Instrument):
    """Frequencies in Hz, amplitudes in displayed volts peak to peak, offsets in V."""

    role = "generator"

    def set_sine(self, frequency: float, amplitude_pp: float, offset: float = 0.0) -> None:
        """Sine function, then amplitude unit, frequency, amplitude and offset."""
        self.configure(
            "function_sine", slot="function", query_key="function_query", parse=parse_word
        )
        if self.profile.has("amplitude_unit"):
            self.configure("amplitude_unit", slot="amplitude_unit")
        self.set_frequency(frequency)
        self.set_amplitude_pp(amplitude_pp)
        self.set_offset(offset)

    def set_frequency(self, frequency: float) -> float:
        """Set the frequency (Hz); returns the generator's read-back value."""
        return float(self.configure("frequency", float(frequency), query_key="frequency_query"))

    def set_amplitude_pp(self, amplitude_pp: float) -> float:
        """Set the displayed amplitude (Vpp, in the present load mode); returns the read-back."""
        return float(self.configure("amplitude", float(amplitude_pp), query_key="amplitude_query"))

    def set_offset(self, offset: float) -> None:
        self.configure("offset", float(offset), query_key="offset_query")

    def set_load_mode(self, mode: str) -> None:
        """ "50 ohm" (the amplitude shown is into 50 Ω) or "high-z" (shown = EMF)."""
        try:
            key = LOAD_MODES[mode]
        except KeyError:
            raise ValueError(
                f"load mode must be one of {', '.join(LOAD_MODES)}, not {mode!r}"
            ) from None
        self.configure(key, slot="load_mode")

    def output(self, on: bool) -> None:
        """Switch the output; read back and remembered for recovery."""
        self.switch("output", on)

    def output_is_on(self) -> bool:
        return self.switched_on("output")
