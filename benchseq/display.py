"""Terminal rendering of a run (rich): progress with the bench time left and the clock time
of the finish (learnt as the run goes), a live
table of the latest points, and the closing summary. Library code never prints; the CLI
hands ``RunDisplay.handle`` to the sequencer as its event sink."""

from __future__ import annotations

import datetime as dt
import math
from collections import deque
from typing import Any

from rich.console import Console, Group
from rich.live import Live
from rich.markup import escape
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn
from rich.table import Table

from benchseq.units import format_si


def rejection_text(row: dict[str, Any], prefix: str = "") -> str:
    """'62.31 dB' for a value, '≥ 91.8 dB' for a lower bound (``prefix`` picks the
    input-referred columns: "" or "_input")."""
    if row.get("is_bound"):
        bound = row.get(f"bound{prefix}_db", float("nan"))
        return f"≥ {bound:.1f} dB" if math.isfinite(bound) else "—"
    value = row.get(f"rejection{prefix}_db", float("nan"))
    return f"{value:.2f} dB" if math.isfinite(value) else "—"


def expanded_text(u: float) -> str:
    """U = k·u (k = SHOWN_COVERAGE_FACTOR) from a standard uncertainty u in dB."""
    from benchseq.records import SHOWN_COVERAGE_FACTOR  # records: the result store's columns

    if not math.isfinite(u):
        return ""
    big_u = SHOWN_COVERAGE_FACTOR * u
    return f"{big_u:.2f} dB" if big_u >= 0.005 else f"{big_u:.1g} dB"


def frequency_text(row: dict[str, Any]) -> str:
    """The planned frequency; the generator's when it was set elsewhere, with the move."""
    planned = float(row.get("frequency_planned", row["frequency"]))
    actual = float(row["frequency"])
    text = format_si(planned, "Hz", 4)
    # a move under 0.5 ppm is the generator's own resolution, not a move: not shown
    if math.isfinite(planned) and planned > 0 and abs(actual / planned - 1) >= 0.5e-6:
        text += f" ({(actual / planned - 1) * 1e6:+.0f} ppm)"
    return text


def _has_input_referred(rows: list[dict[str, Any]]) -> bool:
    return any(
        math.isfinite(float(r.get(name, float("nan"))))
        for r in rows
        for name in ("rejection_input_db", "bound_input_db")
    )


def duration_text(seconds: float) -> str:
    seconds = max(0.0, float(seconds))
    if seconds < 60:
        return f"{seconds:.1f} s"
    minutes, sec = divmod(round(seconds), 60)
    if minutes < 60:
        return f"{minutes} min {sec:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


def finish_part(wall_left: float | None) -> str:
    """', finish ≈ 02:47' from the wall time left at the run's pace; '' when not known."""
    if wall_left is None or not math.isfinite(wall_left):
        return ""
    return f", {finish_text(wall_left)}"


def finish_text(seconds_left: float, now: dt.datetime | None = None) -> str:
    """'finish ≈ 02:47' (local clock time ``seconds_left`` from ``now``); the day is named
    when the finish is not today ('finish ≈ Sun 02:47'), the date beyond a week."""
    start = now if now is not None else dt.datetime.now().astimezone()
    left = max(0.0, float(seconds_left)) if math.isfinite(seconds_left) else 0.0
    end = start + dt.timedelta(seconds=min(left, 3.0e8))  # past ~10 years: not a clock time
    if end.date() == start.date():
        return f"finish ≈ {end:%H:%M}"
    if (end.date() - start.date()).days < 7:
        return f"finish ≈ {end:%a %H:%M}"
    return f"finish ≈ {end:%Y-%m-%d %H:%M}"


def points_table(rows: list[dict[str, Any]], title: str = "latest points") -> Table:
    """The points: planned frequency (with the generator's move in ppm, when moved towards
    a coherent capture), rejection with U = k·u (k = 2), and input-referred rejection
    when the plan declares the device's gain."""
    from benchseq.records import SHOWN_COVERAGE_FACTOR

    inputs = _has_input_referred(rows)
    loads = any(math.isfinite(float(r.get("load_current", float("nan")))) for r in rows)
    table = Table(title=title, title_justify="left", expand=False)
    table.add_column("#", justify="right")
    table.add_column("frequency (planned)", justify="right")
    table.add_column("DC", justify="right")
    if loads:
        table.add_column("load", justify="right")
    table.add_column("pin ripple", justify="right")
    table.add_column("rejection (output-referred)" if inputs else "rejection", justify="right")
    table.add_column(f"± U (k = {SHOWN_COVERAGE_FACTOR:g})", justify="right")
    if inputs:
        table.add_column("rejection (input-referred)", justify="right")
    table.add_column("flags")
    for row in rows:
        pin = abs(complex(row["pin"]))
        cells = [
            str(row["point_id"]),
            frequency_text(row),
            f"{row['dc_level']:.3g} V",
            *([format_si(float(row.get("load_current", float("nan"))), "A", 3)] if loads else []),
            format_si(2 * pin, "Vpp", 3),
            rejection_text(row),
            expanded_text(float(row.get("uncertainty_db", float("nan")))),
        ]
        if inputs:
            cells.append(rejection_text(row, "_input"))
        cells.append(escape(str(row.get("flags", ""))))
        table.add_row(*cells)
    return table


class RunDisplay:
    """Event sink rendering progress and the latest points."""

    def __init__(
        self,
        console: Console,
        total: int,
        bench_time_left: float,
        done: int = 0,
        keep: int = 8,
        wall_time_left: float | None = None,
    ) -> None:
        self.console = console
        self.total = total
        self.per_point = bench_time_left / max(total - done, 1)
        self.latest: deque[dict[str, Any]] = deque(maxlen=keep)
        self.bench_spent = 0.0
        self.progress = Progress(
            TextColumn("[bold]sweep"),
            BarColumn(),
            MofNCompleteColumn(),
            TextColumn("{task.fields[left]}"),
            console=console,
            transient=False,
        )
        self.task = self.progress.add_task(
            "sweep",
            total=total,
            completed=done,
            left=f"planned bench time ≈ {duration_text(bench_time_left)}"
            + finish_part(wall_time_left),
        )
        self.live = Live(self._render(), console=console, refresh_per_second=4, transient=False)

    def __enter__(self) -> RunDisplay:
        self.live.__enter__()
        return self

    def __exit__(self, *exc: object) -> None:
        self.live.update(self._render())
        self.live.__exit__(None, None, None)
        self.console.print()

    def _render(self) -> Group:
        parts: list[Any] = [self.progress]
        if self.latest:
            parts.append(points_table(list(self.latest)))
        return Group(*parts)

    def handle(self, event: Any) -> None:
        if event.kind == "point_stored" and event.row is not None:
            self.latest.append(event.row)
            self.bench_spent += float(event.row.get("bench_time", 0.0))
            done = event.done
            left = event.bench_time_left
            if not left > 0:  # a sink without the learnt figure: the plan's share
                left = max(0.0, (self.total - done) * self.per_point)
            self.progress.update(
                self.task,
                completed=done,
                left=f"bench time left ≈ {duration_text(left)}"
                + finish_part(event.wall_time_left),
            )
        elif event.kind == "point_started":
            self.progress.update(self.task, completed=event.done)
        elif event.kind == "warning":
            self.live.console.print(f"[yellow]warning:[/] {escape(event.message)}")
        elif event.kind == "state":
            self.live.console.print(f"[dim]{escape(event.message)}[/]")
        self.live.update(self._render())
