"""A circuit model's predicted curve beside a measurement: `report RESULT --model FILE.cir`.

The netlist's subcircuit (ports: supply pin, output, ground) is solved by ngspice
(benchseq.sim.netlist) at each curve's operating point: the pin DC the run measured (median
over the curve's points) and the output current (the run's electronic-load current plus the
board's own load, ``board_load``). Its predicted rejection −20·log10|V_out/V_pin| is drawn
with the measurement, and the difference measured − predicted with the measurement's
expanded uncertainty; a bound minus the prediction is a lower bound on the difference.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from benchseq.errors import BadInput

if TYPE_CHECKING:
    from benchseq.report.model import Curve, Report


@dataclass(frozen=True)
class CurvePrediction:
    """The model's prediction at one curve's points (same order as the curve's frame)."""

    curve_index: int
    pin_dc: float  # V
    output_current: float  # A
    rejection_db: np.ndarray


@dataclass(frozen=True)
class ModelOverlay:
    """The netlist, the subcircuit and its prediction for every curve of a report."""

    netlist: Path
    subcircuit: str
    sha256: str
    board_load: float
    predictions: dict[int, CurvePrediction]

    @property
    def label(self) -> str:
        return f"model: {self.netlist.name} ({self.subcircuit})"


def _median(values: np.ndarray, fallback: float) -> float:
    finite = values[np.isfinite(values)]
    return float(np.median(finite)) if finite.size else fallback


def predict(
    report: Report, netlist: str | Path, subcircuit: str, board_load: float = 0.0
) -> ModelOverlay:
    """The overlay for ``report`` (a benchseq.report.model.Report). BadInput for a netlist
    that cannot be used or ngspice missing; MeasurementFailure for an operating point
    ngspice cannot solve."""
    from benchseq.sim.netlist import NetlistSolver, read_netlist

    if not subcircuit:
        raise BadInput("--model needs --subcircuit NAME (its ports: supply pin, output, ground)")
    if not (board_load >= 0 and math.isfinite(board_load)):
        raise BadInput(f"--model-load must be a current of 0 A or more, not {board_load!r}")
    spec = read_netlist(Path(netlist), subcircuit, "report", keys=("--model", "--subcircuit"))
    solver = NetlistSolver(spec)
    solver.check()
    predictions: dict[int, CurvePrediction] = {}
    for curve in report.curves:
        frame = curve.frame
        if not len(frame):
            continue
        op = curve.operating_point
        pin_dc = _median(frame["pin_dc"].to_numpy(dtype=float), op.dc_level)
        load = op.load_current if math.isfinite(op.load_current) else 0.0
        current = board_load + load
        freqs = frame["frequency"].to_numpy(dtype=float)
        transfer, _ = solver.small_signal(pin_dc, current, freqs)
        predictions[curve.index] = CurvePrediction(
            curve.index, pin_dc, current, -20.0 * np.log10(np.abs(transfer))
        )
    return ModelOverlay(Path(netlist), subcircuit, spec.sha256, board_load, predictions)


def differences(overlay: ModelOverlay, curve: Curve) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(measured − predicted of values, their standard uncertainty, bound − predicted of
    bounds) at a curve's points; NaN where the other kind is."""
    frame = curve.frame
    predicted = overlay.predictions[curve.index].rejection_db
    bound = frame["is_bound"].to_numpy(dtype=bool)
    value = frame["rejection_db"].to_numpy(dtype=float)
    u = frame["uncertainty_db"].to_numpy(dtype=float)
    diff = np.where(bound, np.nan, value - predicted)
    bound_diff = np.where(bound, frame["bound_db"].to_numpy(dtype=float) - predicted, np.nan)
    return diff, np.where(bound, np.nan, u), bound_diff
