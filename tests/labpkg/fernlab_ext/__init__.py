"""A lab's own benchseq extensions, registered through entry points (test package, invented).

Installed for the tests by putting this folder on sys.path: its ``*.dist-info`` folder is
what ``pip install`` of a package declaring these entry points would leave behind.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from importlib import resources
from typing import ClassVar

import numpy as np

from benchseq.drivers.generator import Generator
from benchseq.sim.devices import OperatingPoint, PinImpedance


def profile_file():  # entry point benchseq.profiles: fern-awg
    return resources.files(__name__) / "fern-awg.toml"


class CountingGenerator(Generator):
    """The shipped generator role, counting the frequencies it was told to set."""

    frequencies_set: ClassVar[list[float]] = []

    def set_sine(self, frequency, amplitude_pp, offset=0.0):
        _count(frequency)
        return super().set_sine(frequency, amplitude_pp, offset)

    def set_frequency(self, frequency):
        _count(frequency)
        return super().set_frequency(frequency)


def _count(frequency) -> None:
    """Note a frequency set (and, when FERNLAB_LOG names a file, append it there)."""
    CountingGenerator.frequencies_set.append(float(frequency))
    log = os.environ.get("FERNLAB_LOG")
    if log:
        with open(log, "a", encoding="utf-8") as out:
            out.write(f"{float(frequency)!r}\n")


class NotADriver:
    pass


@dataclass(frozen=True)
class RcFilter:
    """A passive RC low-pass between the supply pin and the output (a filtered rail):
    series R from pin to output, C from output to ground."""

    resistance: float
    capacitance: float
    board_load_current: float = 0.0
    kind: str = "rc-filter"
    noise_bandwidth: float = 100e3

    @property
    def pin(self) -> PinImpedance:  # seen from the pin: R in series with C
        return PinImpedance(resistance=math.inf, capacitance=self.capacitance, esr=self.resistance)

    def transfer(self, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
        s = 2j * math.pi * np.asarray(f, dtype=float)
        return 1.0 / (1.0 + s * self.resistance * self.capacitance)

    def output_dc(self, op: OperatingPoint) -> float:
        return op.pin_dc

    def input_current(self, op: OperatingPoint) -> float:
        return 0.0

    def noise_density(self, f: np.ndarray, op: OperatingPoint) -> np.ndarray:
        return np.full(np.shape(f), 4e-9)  # resistor-like white noise, V/√Hz


def rc_filter_device(section, folder):  # entry point benchseq.sim_devices: fern-rc
    device = RcFilter(
        resistance=section.quantity("resistance", "ohm"),
        capacitance=section.quantity("capacitance", "F"),
    )
    section.done()
    return device
