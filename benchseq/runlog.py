"""A run's progress as plain log lines, through the ``benchseq.run`` logger: one line per
stored point (with the bench time left and the local clock time of the finish, until the
last), one per change of operating point, the run's states and warnings.

``ProgressLog`` is an event sink like the live display; it only logs. Where the lines go
(the terminal's stderr, the run log file beside the result) is the command line's choice:
library code never attaches a handler (benchseq.__init__ gives the package logger a
NullHandler, the usual arrangement for a library)."""

from __future__ import annotations

import logging
import math
from pathlib import Path
from typing import Any

from benchseq.display import (
    duration_text,
    expanded_text,
    finish_part,
    frequency_text,
    rejection_text,
)
from benchseq.units import format_si

RUN_LOGGER = "benchseq.run"
CLOCK_FORMAT = "%Y-%m-%d %H:%M:%S"


def run_log_path(result: str | Path) -> Path:
    """The run log beside a result file: RESULT.log for RESULT.h5."""
    path = Path(result)
    log = path.with_suffix(".log")
    return log if log != path else path.with_name(path.name + ".log")


def operating_point_text(row: dict[str, Any]) -> str:
    """'DC 5 V' or 'DC 5 V, load 20 mA' (the load only on a plan with a load axis)."""
    text = f"DC {float(row['dc_level']):.4g} V"
    load = float(row.get("load_current", float("nan")))
    if math.isfinite(load):
        text += f", load {format_si(load, 'A', 3)}"
    return text


def point_line(row: dict[str, Any], done: int, total: int) -> str:
    """One stored point: index of total, point id, frequency, operating point, the
    rejection (a value with U and its coverage factor, or the lower bound) and the flags."""
    value = rejection_text(row)
    spread = expanded_text(float(row.get("uncertainty_db", float("nan"))))
    if not row.get("is_bound") and spread:
        from benchseq.records import SHOWN_COVERAGE_FACTOR

        value += f" ± {spread} (k = {SHOWN_COVERAGE_FACTOR:g})"
    flags = str(row.get("flags", "")).strip() or "-"
    return (
        f"point {done}/{total} (#{row.get('point_id')}) {frequency_text(row)} "
        f"{operating_point_text(row)} rejection {value} flags {flags}"
    )


class ProgressLog:
    """Event sink logging a run as lines (INFO; warnings at WARNING).

    ``resumed`` adds a line marking the resume before the first line of the session."""

    def __init__(self, logger: logging.Logger | None = None, resumed: bool = False) -> None:
        self.logger = logger or logging.getLogger(RUN_LOGGER)
        self.resumed = resumed
        self._started = False
        self._operating_point: str | None = None
        self.points = 0  # point lines logged

    def __call__(self, event: Any) -> None:
        if not self._started:
            self._started = True
            if self.resumed:
                self.logger.info("---- run resumed ----")
        kind = event.kind
        if kind == "point_stored" and event.row is not None:
            here = operating_point_text(event.row)
            if here != self._operating_point:
                self._operating_point = here
                self.logger.info("operating point %s", here)
            self.points += 1
            line = point_line(event.row, event.done, event.total)
            if event.done < event.total:  # what is left, learnt from the points so far
                left = float(getattr(event, "bench_time_left", 0.0))
                line += f"; bench time left ≈ {duration_text(left)}"
                line += finish_part(getattr(event, "wall_time_left", None))
            self.logger.info("%s", line)
        elif kind == "warning":
            self.logger.warning("%s", event.message)
        elif kind == "caution":  # before the bench opens (a real bench): said, never asked
            self.logger.warning("%s", event.message, extra={"label": "caution"})
        elif kind in ("state", "finished") and event.message:
            self.logger.info("%s", event.message)


class LineFormatter(logging.Formatter):
    """'2026-12-05 09:14:03 message', with 'warning: ' / 'error: ' before what is one (or
    the record's own ``label``, e.g. 'caution: ')."""

    def __init__(self) -> None:
        super().__init__("%(asctime)s %(message)s", CLOCK_FORMAT)

    def format(self, record: logging.LogRecord) -> str:
        text = super().format(record)
        label = getattr(record, "label", None)
        if label is not None:
            prefix = f"{label}: "
        elif record.levelno >= logging.ERROR:
            prefix = "error: "
        elif record.levelno >= logging.WARNING:
            prefix = "warning: "
        else:
            return text
        stamp = self.formatTime(record, self.datefmt)
        return f"{stamp} {prefix}{text[len(stamp) + 1 :]}"
