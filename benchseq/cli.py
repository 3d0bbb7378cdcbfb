"""The `benchseq` command: parse, call, print. Exit codes: 0 ok, 1 measurement or
instrument failure (or refused points, or a run stopped before it finished), 2 bad input."""

from __future__ import annotations

import argparse
import contextlib
import json
import logging
import os
import sys
import warnings
from collections.abc import Iterator, Sequence
from typing import TYPE_CHECKING, Any

from benchseq import __version__
from benchseq.errors import BadInput, BenchseqError

if TYPE_CHECKING:
    from benchseq.display import RunDisplay

EXIT_OK, EXIT_FAILURE, EXIT_BAD_INPUT = 0, 1, 2


def _console(stderr: bool = False) -> Any:
    from rich.console import Console

    # Messages on stderr, and everything written to a file or a pipe, are never wrapped by
    # rich (soft_wrap): a path, a key or a value with its unit stays on one line, whole, for
    # a terminal to wrap and a script or a log to read ("bench time 20.8 s" was split
    # before its unit in a redirected run's summary).
    stream = sys.stderr if stderr else sys.stdout
    piped = not (hasattr(stream, "isatty") and stream.isatty())
    return Console(stderr=stderr, highlight=False, soft_wrap=stderr or piped)


def _escape(value: object) -> str:
    from rich.markup import escape

    return escape(str(value))


def _print_json(data: Any) -> None:
    sys.stdout.write(json.dumps(data, indent=2, default=_json_default) + "\n")


def _json_default(value: Any) -> Any:
    import numpy as np

    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, complex):
        return {"re": value.real, "im": value.imag}
    raise TypeError(f"not JSON-serialisable: {type(value).__name__}")


@contextlib.contextmanager
def _result_notices() -> Iterator[None]:
    """Print what reading or repairing a result file noticed (damage, repairs) as notices."""
    from benchseq.store import ResultWarning

    caught: list[warnings.WarningMessage] = []
    try:
        with warnings.catch_warnings(record=True) as recording:
            warnings.simplefilter("always", ResultWarning)
            try:
                yield
            finally:
                caught = list(recording)
    finally:
        said = dict.fromkeys(str(w.message) for w in caught if w.category is ResultWarning)
        for notice in said:
            _console(stderr=True).print(f"[bold yellow]notice:[/] {_escape(notice)}")
        # other warnings go on as they came, once the recording has ended: re-issued
        # inside it, each was recorded again behind the loop and the loop never ended
        for w in caught:
            if w.category is not ResultWarning:
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)


def _repair_for_reading(path: str) -> None:
    """Repair a result's HDF5 file from its journal before reading (notices say so)."""
    from benchseq.store import ResultWarning, repair_mirror

    for notice in repair_mirror(path).notices(path):
        warnings.warn(notice, ResultWarning, stacklevel=2)


def _refuse_same_file(source: str, out: str | None, what: str) -> None:
    """BadInput when ``out`` is ``source`` or its journal (never overwrite the input)."""
    import os
    from pathlib import Path

    if not out:
        return
    for target in (Path(out), Path(out + ".journal")):
        try:
            same = os.path.samefile(source, target) or Path(source).resolve() == target.resolve()
        except OSError:
            same = Path(source).resolve() == target.resolve()
        if same:
            raise BadInput(f"{what} {out} is the input {source}; give another output file")


# -- commands --------------------------------------------------------------------------
def cmd_check(args: argparse.Namespace) -> int:
    from benchseq.bench import load_bench
    from benchseq.check import check_plan, render_check
    from benchseq.plan import load_plan
    from benchseq.preflight import preflight

    bench = load_bench(args.bench)
    plan = load_plan(args.plan)
    preflight(plan, bench)  # what `run` needs of both files, before its feasibility
    like = None
    if args.like:
        from benchseq.check import load_likeness

        like = load_likeness(args.like, plan, bench)
    report = check_plan(plan, bench, like)
    if args.json:
        _print_json(report.to_dict())
    else:
        _console().print(render_check(report))
    return report.exit_code


def cmd_injector(args: argparse.Namespace) -> int:
    from benchseq.bench import load_bench
    from benchseq.check import injector_report, plot_injector, plot_target, render_injector
    from benchseq.units import parse_amplitude

    if args.plot:
        plot_target(args.plot)  # a bad --plot is refused before anything is computed
    bench = load_bench(args.bench)
    ripple = parse_amplitude(args.ripple, "--ripple") if args.ripple else None
    report = injector_report(bench, ripple)
    if args.plot:
        plot_injector(bench, args.plot, ripple)
    if args.json:
        _print_json(report.to_dict())
    else:
        _console().print(render_injector(report))
        if args.plot:
            _console().print(f"Bode plot written to {args.plot}")
    return EXIT_OK


class _LiveDisplay:
    """Event sink that opens a RunDisplay on the first event and closes it at the end."""

    def __init__(self, console: Any, quiet: bool = False) -> None:
        self.console, self.quiet = console, quiet
        self.display: RunDisplay | None = None

    def __call__(self, event: Any) -> None:
        from benchseq.display import RunDisplay

        if self.quiet:
            return
        if event.kind == "caution":  # before the bench opens: printed once, never asked
            self.console.print(f"[bold yellow]caution:[/] {_escape(event.message)}")
            return
        if self.display is None:
            self.display = RunDisplay(
                self.console,
                event.total or 0,
                event.bench_time_left,
                event.done,
                wall_time_left=event.wall_time_left,
            )
            self.display.__enter__()
        self.display.handle(event)

    def close(self) -> None:
        if self.display is not None:
            self.display.__exit__()
            self.display = None


class _ConsoleFilter(logging.Filter):
    """What the terminal's log handler leaves out: the run's own lines while the live
    display shows them, and what is meant for the run log file only."""

    def __init__(self) -> None:
        super().__init__()
        self.live = False

    def filter(self, record: logging.LogRecord) -> bool:
        if getattr(record, "run_log_only", False):
            return False
        return not (self.live and record.name == "benchseq.run")


def _is_terminal(console: Any) -> bool:
    """True when the console writes to a terminal (its stream's isatty; FORCE_COLOR and the
    like colour the output but do not make a redirected run draw a live display)."""
    isatty = getattr(console.file, "isatty", None)
    try:
        return bool(isatty()) if isatty is not None else False
    except ValueError:  # a closed stream
        return False


class _Progress:
    """Event sink of a run: its log lines (benchseq.runlog) always; on a terminal, and
    unless --quiet, the live display too (the terminal's log handler then leaves the lines
    to it). Without a terminal (output redirected) the lines are the progress."""

    def __init__(self, console: Any, args: argparse.Namespace) -> None:
        from benchseq.runlog import ProgressLog

        self.log = ProgressLog()
        live = not getattr(args, "quiet", False) and _is_terminal(console)
        self.display = _LiveDisplay(console) if live else None
        self.filter: _ConsoleFilter | None = getattr(args, "log_filter", None)
        if self.filter is not None:
            self.filter.live = live

    def __call__(self, event: Any) -> None:
        self.log(event)
        if self.display is not None:
            self.display(event)

    def close(self) -> None:
        if self.display is not None:
            self.display.close()
        if self.filter is not None:
            self.filter.live = False


def cmd_replay(args: argparse.Namespace) -> int:
    from pathlib import Path

    from benchseq.results import check_readable
    from benchseq.writelock import refuse_non_regular

    refuse_non_regular(Path(args.result))
    _refuse_same_file(args.result, args.out, "the output file")
    check_readable(args.result)  # a damaged file that would crash libhdf5 is refused
    if args.reanalyse:
        from benchseq.reanalyse import reanalyse, render_reanalysis

        if args.plan or args.device != "learned":
            raise BadInput(
                "--reanalyse recomputes the stored points; it takes no --plan or --device"
            )
        redone = reanalyse(args.result, args.out, force=args.force)
        if args.json:
            _print_json(redone.to_dict())
        else:
            _console().print(render_reanalysis(redone))
            _console().print(f"results: [bold]{_escape(redone.path)}[/]")
        return EXIT_OK

    from benchseq.replay import render_comparison, replay
    from benchseq.stopping import StopControl

    console = _console(stderr=args.json)
    stop = StopControl()
    sink = _Progress(console, args)
    with stop.installed():
        try:
            outcome = replay(
                args.result,
                plan_path=args.plan,
                device=args.device,
                out=args.out,
                seed=args.seed,
                emit=sink,
                stop=stop,
                force=args.force,
            )
        finally:
            sink.close()
    if args.json:
        _print_json(outcome.to_dict())
    else:
        console.print(render_comparison(outcome))
        console.print(f"replay results: [bold]{_escape(outcome.path)}[/]")
    ok = outcome.run.status == "complete" and not outcome.run.not_safe
    return EXIT_OK if ok else EXIT_FAILURE


def cmd_calibrate(args: argparse.Namespace) -> int:
    from rich.prompt import Confirm

    from benchseq.calibrate import calibration_summary, render_calibration, run_calibration
    from benchseq.stopping import StopControl

    console = _console(stderr=args.json)
    stop = StopControl()
    sink = _Progress(console, args)

    def confirm(message: str) -> bool:
        console.print(_escape(message))
        try:
            return Confirm.ask("Both probes on the pin?", console=console, default=False)
        except EOFError:
            return False

    with stop.installed():
        try:
            result = run_calibration(
                args.plan,
                args.bench,
                args.out,
                force=args.force,
                seed=args.seed,
                confirm=confirm,
                emit=sink,
                stop=stop,
            )
        finally:
            sink.close()
    if args.json:
        _print_json(calibration_summary(result))
    else:
        console.print(render_calibration(result))
    return EXIT_OK


class _RunEnding:
    """How `run` ended, for its run log (RESULT.log beside the result) and its after-run
    command: both are set up here, the command started on every way out (benchseq.afterrun)."""

    def __init__(self, args: argparse.Namespace) -> None:
        self.args = args
        self.path: Any = None
        self.status, self.reason, self.verdict = "failed", "", ""
        self.not_safe: list[str] = []
        self.handler: logging.FileHandler | None = None
        self._command: tuple[list[str], float | None] | None = None

    def open_log(self, path: Any) -> None:
        """The run log beside ``path``: replaced by a new run, appended to on --resume; the
        file is created with the first line (so a run refused before it began leaves none)."""
        from benchseq.runlog import LineFormatter, run_log_path

        self.path = path
        handler = logging.FileHandler(
            run_log_path(path), mode="a" if self.args.resume else "w", encoding="utf-8", delay=True
        )
        handler.setFormatter(LineFormatter())
        handler.setLevel(logging.DEBUG if self.args.verbose else logging.INFO)
        logging.getLogger("benchseq").addHandler(handler)
        self.handler = handler

    def failed(self, exc: BaseException) -> int:
        """The exit code ``main`` gives for ``exc``; noted in the run log if it began."""
        if isinstance(exc, BadInput):
            self.status, code = "refused", EXIT_BAD_INPUT
        elif isinstance(exc, BenchseqError):
            self.status, code = "failed", exc.exit_code
        elif isinstance(exc, KeyboardInterrupt):
            self.status, code = "stopped", EXIT_FAILURE
        else:
            self.status, code = "failed", EXIT_FAILURE
        self.reason = str(exc) or type(exc).__name__
        if self.handler is not None and self.handler.stream is not None:
            logging.getLogger("benchseq.run").error(
                "run %s: %s", self.status, self.reason, extra={"run_log_only": True}
            )
        return code

    def close(self, code: int) -> None:
        """Start the after-run command (if any), then let go of the run log."""
        handler, self.handler = self.handler, None
        if handler is not None and handler.stream is None:  # nothing began: no log file
            logging.getLogger("benchseq").removeHandler(handler)
            handler = None
        try:
            self._after_run(code, handler)
        finally:
            if handler is not None:
                logging.getLogger("benchseq").removeHandler(handler)
                handler.close()

    def _after_run(self, code: int, handler: logging.FileHandler | None) -> None:
        from benchseq.afterrun import DEFAULT_TIMEOUT_S, ending_environment, run_after_command

        argv, timeout = self.command()
        if not argv:
            return
        variables = ending_environment(
            result=os.path.abspath(self.path) if self.path else "",
            status=self.status,
            verdict=self.verdict,
            exit_code=code,
            reason=self.reason,
            not_safe=self.not_safe,
            run_log=handler.baseFilename if handler is not None else "",
        )
        run_after_command(argv, variables, timeout or DEFAULT_TIMEOUT_S)

    def command(self) -> tuple[list[str], float | None]:
        """--after-run, else the bench's [after_run] (the stored bench on --resume); none
        when neither is given or the bench cannot be read (its error is reported already).
        Read once: a new run's bench when it starts, a resumed run's at its end."""
        if self._command is None:
            self._command = self._read_command()
        return self._command

    def _read_command(self) -> tuple[list[str], float | None]:
        import shlex

        bench = None
        try:
            if self.args.resume:
                from benchseq.bench import parse_bench
                from benchseq.store import read_meta
                from benchseq.tomlfile import parse_toml_text

                meta = read_meta(self.args.resume)
                text, data = parse_toml_text(
                    meta["bench_text"], f"{self.args.resume} (stored bench)"
                )
                bench = parse_bench(data, str(meta["bench_source"]), text)
            else:
                from benchseq.bench import load_bench

                bench = load_bench(self.args.bench)
        except Exception:  # a bench that cannot be read names no command
            bench = None
        timeout = bench.after_run_timeout if bench is not None else None
        if self.args.after_run:
            return shlex.split(self.args.after_run), timeout
        if bench is not None and bench.after_run:
            return list(bench.after_run), timeout
        return [], timeout


def _run_path(args: argparse.Namespace) -> Any:
    """The result file of this run: --resume's, --out, or the plan's default name."""
    from pathlib import Path

    from benchseq.plan import load_plan
    from benchseq.runner import default_output

    if args.resume:
        return Path(args.resume)
    if not args.plan:
        raise BadInput("give a plan file (or --resume RESULT.h5)")
    return Path(args.out) if args.out else default_output(load_plan(args.plan))


def cmd_run(args: argparse.Namespace) -> int:
    ending = _RunEnding(args)
    if not args.resume:
        ending.command()  # the bench's after-run command as the run starts
    code = EXIT_FAILURE
    try:
        ending.open_log(_run_path(args))
        code = _run(args, ending)
        return code
    except BaseException as exc:
        code = ending.failed(exc)
        raise
    finally:
        ending.close(code)


def _run(args: argparse.Namespace, ending: _RunEnding) -> int:
    from benchseq.display import duration_text
    from benchseq.runner import resume_run, start_run
    from benchseq.stopping import StopControl

    console = _console(stderr=args.json)
    stop = StopControl()
    emit = _Progress(console, args)

    with stop.installed(), _result_notices():
        try:
            if args.resume:
                outcome, path = resume_run(args.resume, args.plan, args.bench, emit=emit, stop=stop)
            else:
                outcome, path = start_run(
                    args.plan,
                    args.bench,
                    str(ending.path),
                    force=args.force,
                    keep_waveforms=args.keep_waveforms,
                    seed=args.seed,
                    emit=emit,
                    stop=stop,
                )
        finally:
            emit.close()
    if outcome is None:
        ending.status, ending.reason = "complete", "already complete; nothing to do"
        if args.json:
            _print_json({"status": "complete", "reason": ending.reason, "file": str(path)})
        else:
            console.print(f"{_escape(path)} is already complete; nothing to do.")
        return EXIT_OK
    from benchseq.store import read_meta, read_results

    with _result_notices():
        verdict = _verdict(read_meta(path), read_results(path), str(path))
    ending.status, ending.reason = outcome.status, outcome.reason
    ending.not_safe = list(outcome.not_safe)
    ending.verdict = verdict.status if verdict is not None else ""
    if args.json:
        _print_json(
            {
                "status": outcome.status,
                "reason": outcome.reason,
                "file": str(path),
                "measured": outcome.measured,
                "bounds": outcome.bounds,
                "flagged": outcome.flagged,
                "bench_time_s": outcome.bench_time,
                "safe_state": list(outcome.safe_state),
                "not_safe": list(outcome.not_safe),
                "verdict": ending.verdict or None,
            }
        )
    else:
        colour = {"complete": "green", "stopped": "yellow"}.get(outcome.status, "red")
        console.print(f"[bold {colour}]run {outcome.status}[/]: {_escape(outcome.reason)}")
        if not args.quiet:
            console.print(
                f"points measured this session: {outcome.measured} "
                f"(lower bounds: {outcome.bounds}, flagged: {outcome.flagged}); "
                f"bench time {duration_text(outcome.bench_time)}"
            )
            console.print("safe state: " + _escape("; ".join(outcome.safe_state)))
        if verdict is not None and verdict.status != "no mask":
            console.print(_verdict_markup(verdict))
        if not args.quiet:
            console.print(f"results: [bold]{_escape(path)}[/]")
            if outcome.status != "complete":
                console.print(f"continue with: benchseq run --resume {_escape(path)}")
            console.print(f"summary: benchseq show {_escape(path)}")
            console.print(f"lab report: benchseq report {_escape(path)}")
    if outcome.not_safe:  # never exit 0 with a bench that may still be energised
        _not_safe_alarm(outcome.not_safe, stderr=args.json)
        return EXIT_FAILURE
    return EXIT_OK if outcome.status == "complete" else EXIT_FAILURE  # stopped early: 1


def _not_safe_alarm(not_safe: list[str], stderr: bool) -> None:
    """The loud ending of a run whose safe state failed: what to switch off by hand."""
    console = _console(stderr=stderr)
    console.print("[bold red]THE BENCH WAS NOT MADE SAFE.[/] Not made safe:")
    for line in not_safe:
        console.print(f"[bold red]  - {_escape(line)}[/]")
    console.print(
        "[bold red]Switch these off by hand now (generator, then load, then supply), "
        "following your local safety codes.[/]"
    )


def _verdict(meta: dict[str, Any], frame: Any, path: str) -> Any:
    """The mask verdict of a stored run (None when its plan cannot be read back)."""
    from benchseq.plan import parse_plan
    from benchseq.tomlfile import parse_toml_text
    from benchseq.verdict import mask_verdict

    try:
        text, data = parse_toml_text(str(meta.get("plan_text", "")), f"{path} (stored plan)")
        plan = parse_plan(data, str(meta.get("plan_source", path)), text)
    except BenchseqError:
        return None
    count = meta.get("point_count")
    return mask_verdict(plan.mask, frame, planned=count if isinstance(count, int) else None)


def _verdict_markup(verdict: Any) -> str:
    colour = {"pass": "green", "fail": "red"}.get(verdict.status, "yellow")
    return f"[bold {colour}]mask:[/] {_escape(verdict.summary())}"


def cmd_show(args: argparse.Namespace) -> int:
    from benchseq.overview import is_calibration_file, render_result
    from benchseq.results import check_readable
    from benchseq.store import read_meta, read_results

    check_readable(args.result)  # a damaged file that would crash libhdf5 is refused
    if is_calibration_file(args.result):
        return _show_calibration(args)
    with _result_notices():
        _repair_for_reading(args.result)
        meta = read_meta(args.result)
        frame = read_results(args.result)
    verdict = _verdict(meta, frame, args.result)
    if args.json:
        _print_json(
            {
                "meta": {k: v for k, v in meta.items() if not k.endswith("_text")},
                "mask": verdict.to_dict() if verdict is not None else None,
                "units": dict(frame.attrs.get("units", {})),
                "points": frame.to_dict(orient="records"),
            }
        )
        return EXIT_OK
    console = _console()
    for part in render_result(meta, frame, verdict, args.result, all_rows=args.all):
        console.print(part)
    return EXIT_OK


def _show_calibration(args: argparse.Namespace) -> int:
    """`show CAL.h5`: describe the channel-match calibration file."""
    from benchseq.calibrate import calibration_summary, load_calibration
    from benchseq.overview import calibration_figures, render_calibration_file

    loaded = load_calibration(args.result)
    if args.json:
        summary = calibration_summary(loaded)
        summary["kind"] = "channel-match calibration"
        summary["meta"] = {k: v for k, v in loaded.meta.items() if not k.endswith("_text")}
        summary["match"] = calibration_figures(loaded)
        _print_json(summary)
        return EXIT_OK
    console = _console()
    for part in render_calibration_file(loaded):
        console.print(part)
    return EXIT_OK


def cmd_report(args: argparse.Namespace) -> int:
    from benchseq.report import format_name, write_report
    from benchseq.results import check_readable

    fmt = format_name(args.format, args.out)
    model = None
    if args.model is not None:
        from benchseq.units import parse_quantity

        board_load = parse_quantity(args.model_load, "A", "--model-load")
        model = (args.model, args.subcircuit or "", board_load)
    elif args.subcircuit is not None:
        raise BadInput("--subcircuit goes with --model FILE.cir")
    for result in args.results:
        _refuse_same_file(result, args.out, "the report file")
    for result in args.results:
        check_readable(result)
    with _result_notices():
        for result in args.results:
            _repair_for_reading(result)
        written = write_report(args.results, fmt, args.out, model=model)
    if args.json:
        _print_json({"format": fmt, "files": [str(p) for p in written]})
        return EXIT_OK
    console = _console()
    console.print(f"{fmt} report written to [bold]{_escape(written[0])}[/]")
    for extra in written[1:]:
        console.print(f"  beside it: {_escape(extra)}")
    return EXIT_OK


def cmd_compare(args: argparse.Namespace) -> int:
    from pathlib import Path

    from benchseq.compare import compare_files, render_comparisons, write_plot
    from benchseq.results import check_readable

    model = None
    if args.model is not None:
        from benchseq.units import parse_quantity

        model = (
            args.model,
            args.subcircuit or "",
            parse_quantity(args.model_load, "A", "--model-load"),
        )
    elif args.subcircuit is not None:
        raise BadInput("--subcircuit goes with --model FILE.cir")
    if args.plot:
        from benchseq.report.output import check_output

        if not args.plot.lower().endswith(".png"):
            raise BadInput(f"--plot {args.plot}: give a .png file name")
        check_output(Path(args.plot), args.results)
    for result in args.results:
        check_readable(result)
    with _result_notices():
        for result in args.results:
            _repair_for_reading(result)
        comparisons = compare_files(args.results, model)
    written = write_plot(comparisons, args.plot) if args.plot else []
    if args.json:
        _print_json(
            {"comparisons": [c.to_dict() for c in comparisons], "plots": [str(p) for p in written]}
        )
        return EXIT_OK
    console = _console()
    for part in render_comparisons(comparisons, all_rows=args.all):
        console.print(part)
    for path in written:
        console.print(f"plot written to [bold]{_escape(path)}[/]")
    return EXIT_OK


def cmd_scan(args: argparse.Namespace) -> int:
    from benchseq.drivers.session import scan

    addresses = _scan_addresses(args.address)
    if not (0 < args.timeout <= 600):
        raise BadInput(f"--timeout {args.timeout:g}: give seconds above 0, at most 600")
    entries = scan(args.visa_library, timeout_s=args.timeout, resources=addresses or None)
    if args.json:
        _print_json(
            [{"resource": e.resource, "identity": e.identity, "error": e.error} for e in entries]
        )
        return EXIT_OK
    from rich.table import Table

    table = Table(title=f"VISA resources ({args.visa_library})")
    table.add_column("resource")
    table.add_column("*IDN? reply or error")
    for e in entries:
        table.add_row(_escape(e.resource), _escape(e.identity or f"no answer: {e.error}"))
    _console().print(table if entries else "no VISA resources found")
    return EXIT_OK


def _scan_addresses(given: Sequence[str]) -> list[str]:
    """The addresses to ask, HOST:PORT written out as TCPIP::HOST::PORT::SOCKET; BadInput
    for anything that is not a VISA resource string (pyvisa would fail obscurely on it)."""
    from benchseq.visaname import AddressError, check_resource_name, expand_host_port

    addresses = []
    for text in given:
        try:
            addresses.append(check_resource_name(expand_host_port(text)))
        except AddressError as exc:
            raise BadInput(f"scan {text}: {exc} (or HOST:PORT for a raw socket)") from None
    return addresses


def cmd_sim_serve(args: argparse.Namespace) -> int:
    from benchseq.sim.server import sim_serve_main

    return int(
        sim_serve_main(
            args.scenario, base_port=args.port, seed=args.seed, console=_console(), log=args.log
        )
    )


# -- watch: a read-only live page of a run (benchseq/watch.py) --------------------------
def cmd_watch(args: argparse.Namespace) -> int:
    from benchseq.watch import bind_warning, open_server

    server = open_server(args.result, args.host, args.port)  # bad file: exit 2, nothing served
    console = _console()
    warning = bind_warning(args.host)
    if warning:
        console.print(f"[bold yellow]warning:[/] {_escape(warning)}")
    console.print(f"watching {_escape(args.result)} (read-only) at [bold]{server.url}[/]")
    console.print("Ctrl-C to stop.")
    try:
        server.serve_forever(poll_interval=0.5)
    except KeyboardInterrupt:
        console.print("stopped watching; the run and its file are untouched.")
    finally:
        server.server_close()
    return EXIT_OK


def _add_watch_parser(sub: Any) -> None:
    p = sub.add_parser("watch", help="a read-only local web page following a run as it is stored")
    p.add_argument("result", help="result file (.h5), in progress or finished")
    p.add_argument(
        "--host",
        default="127.0.0.1",
        help="address to serve on (default 127.0.0.1, this machine only; the page has no "
        "authentication: from elsewhere prefer an SSH tunnel)",
    )
    p.add_argument("--port", type=int, default=0, help="TCP port (default 0: any free port)")
    p.set_defaults(func=cmd_watch)


# -- catalog: many runs in one queryable dataset (benchseq/catalog.py) -------------------
def cmd_catalog(args: argparse.Namespace) -> int:
    if args.catalog_command == "build":
        return _catalog_build(args)
    if args.catalog_command == "query":
        return _catalog_query(args)
    raise BadInput("catalog needs an action: build or query")


def _catalog_build(args: argparse.Namespace) -> int:
    from benchseq.catalog import build

    report = build(args.dirs, args.into)
    if args.json:
        _print_json(report.to_dict())
        return EXIT_OK
    err = _console(stderr=True)
    for source, reason in report.skipped:
        err.print(
            f"[bold yellow]skipped (damaged):[/] {_escape(source)}: {_escape(reason)}",
            soft_wrap=True,
        )
    for source, notice in report.notices:
        err.print(f"[bold yellow]notice:[/] {_escape(source)}: {_escape(notice)}", soft_wrap=True)
    for source, same in report.duplicates:
        err.print(f"skipped (same content as {_escape(same)}): {_escape(source)}", soft_wrap=True)
    _console().print(
        f"catalog {_escape(report.catalog)}: {report.found} result file(s) found; "
        f"{len(report.added)} added, {len(report.replaced)} replaced, "
        f"{report.unchanged} unchanged (skipped), {len(report.skipped)} damaged (skipped), "
        f"{len(report.not_runs)} calibration file(s) ignored; now {report.files} run(s), "
        f"{report.rows} point(s), {report.incomplete_runs} incomplete run(s)",
        soft_wrap=True,
    )
    return EXIT_OK


def _catalog_query(args: argparse.Namespace) -> int:
    from benchseq.catalog import Filters, connect, run_sql, summary
    from benchseq.units import parse_quantity

    if (args.summary is None) == (args.sql is None):
        raise BadInput("catalog query: give a summary (runs, worst, flags) or --sql, not both")
    filters = Filters(
        frequency=None if args.frequency is None else parse_quantity(args.frequency, "Hz", "--frequency"),
        band=None if args.band is None else (
            parse_quantity(args.band[0], "Hz", "--band"), parse_quantity(args.band[1], "Hz", "--band")
        ),
        dc_level=None if args.dc is None else parse_quantity(args.dc, "V", "--dc"),
        load_current=None if args.load is None else parse_quantity(args.load, "A", "--load"),
        device=args.device,
        lab=args.lab,
        night=args.night,
    )  # fmt: skip
    if args.frequency is not None and args.band is not None:
        raise BadInput("catalog query: --frequency and --band exclude each other")
    con = connect(args.catalog)
    try:
        table = run_sql(con, args.sql, "query") if args.sql else summary(con, args.summary, filters)
    finally:
        con.close()
    if args.json:
        _print_json({"query": table.title, "columns": table.columns, "rows": table.records()})
        return EXIT_OK
    from rich.table import Table

    shown = table.rows[: args.limit]
    out = Table(title=f"{table.title} ({len(table.rows)} row(s))")
    for column in table.columns:
        out.add_column(column, overflow="fold")
    for row in shown:
        out.add_row(*(_catalog_cell(v) for v in row))
    console = _console()
    console.print(out)
    if len(table.rows) > len(shown):
        console.print(f"{len(table.rows) - len(shown)} more row(s): raise --limit or use --json")
    return EXIT_OK


def _catalog_cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return f"{value:.6g}"
    return _escape(value)


def _add_catalog_parser(sub: Any) -> None:
    p = sub.add_parser("catalog", help="many runs in one queryable Parquet dataset (DuckDB)")
    csub = p.add_subparsers(dest="catalog_command", metavar="ACTION")
    q = csub.add_parser("build", help="add every result file under folders (incremental)")
    q.add_argument("dirs", nargs="+", metavar="DIR", help="folder(s) searched for result files")
    q.add_argument("--into", required=True, metavar="CATALOG_DIR", help="the catalog folder")
    q.add_argument("--json", action="store_true", help="print what was done as JSON")
    q.set_defaults(func=cmd_catalog)
    q = csub.add_parser("query", help="a named summary, or SQL over the views points and runs")
    q.add_argument("catalog", metavar="CATALOG_DIR", help="a folder made by catalog build")
    q.add_argument("summary", nargs="?", choices=("runs", "worst", "flags"), help="summary")
    q.add_argument("--sql", help='SQL over the views points and runs, e.g. "SELECT ..."')
    q.add_argument("--frequency", help="worst: at each run's planned frequency nearest this")
    q.add_argument("--band", nargs=2, metavar=("LOW", "HIGH"), help="worst: planned frequencies in")
    q.add_argument("--dc", help="only points at this DC level (e.g. 5 V)")
    q.add_argument("--load", help="only points at this load current (e.g. 100 mA)")
    q.add_argument("--device", help="only devices whose name contains this")
    q.add_argument("--lab", help="only benches whose name contains this")
    q.add_argument("--night", metavar="YYYY-MM-DD", help="only runs of this night")
    q.add_argument("--limit", type=int, default=200, help="rows shown in the table (default 200)")
    q.add_argument("--json", action="store_true", help="print the rows as JSON")
    q.set_defaults(func=cmd_catalog)
    p.set_defaults(func=cmd_catalog, catalog_command=None)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="benchseq",
        description="Supply-ripple rejection (PSRR) sweeps on SCPI instruments or a simulated bench.",
        epilog="Exit codes: 0 ok, 1 measurement/instrument failure, refused points or a run "
        "stopped before it finished, 2 bad input.",
    )
    parser.add_argument("--version", action="version", version=f"benchseq {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("check", help="validate a plan and bench, list refused or marginal points")
    p.add_argument("plan", help="plan file (TOML)")
    p.add_argument("--bench", help="bench file; omit (or 'sim') for the embedded simulated bench")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument(
        "--like",
        metavar="RESULT",
        help="a previous result of this bench and device: estimate the bench time from the "
        "noise and rejection it measured (else from stated assumptions)",
    )
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("injector", help="the injector's computed response, corners and usable band")
    p.add_argument("--bench", help="bench file; omit (or 'sim') for the embedded simulated bench")
    p.add_argument("--ripple", help="pin ripple to show the generator setting for, e.g. 100mVpp")
    p.add_argument("--plot", metavar="FILE", help="write a Bode-style PNG")
    p.add_argument("--json", action="store_true", help="print the figures as JSON")
    p.set_defaults(func=cmd_injector)

    p = sub.add_parser("run", help="run a plan's sweep and store every point (HDF5)")
    p.add_argument("plan", nargs="?", help="plan file (TOML)")
    p.add_argument("--bench", help="bench file; omit (or 'sim') for the embedded simulated bench")
    p.add_argument("--out", help="result file (default: results/<plan>-<time>.h5)")
    p.add_argument("--resume", metavar="RESULT", help="continue an interrupted run")
    p.add_argument("--force", action="store_true", help="overwrite an existing result file")
    p.add_argument("--keep-waveforms", action="store_true", help="store raw scope records")
    p.add_argument("--seed", type=int, default=0, help="seed of the simulated bench (default 0)")
    p.add_argument(
        "--after-run",
        metavar="COMMAND",
        help="program (and arguments, split as a POSIX shell would, but run without one) to "
        "start when the run ends in any state; replaces the bench's [after_run] command",
    )
    p.add_argument("--json", action="store_true", help="print the outcome as JSON")
    p.set_defaults(func=cmd_run)

    p = sub.add_parser(
        "show", help="summary, verdict and table of a stored run (or a calibration file)"
    )
    p.add_argument("result", help="result file (.h5), or a calibration file (CAL.h5)")
    p.add_argument("--all", action="store_true", help="list every point (a long run is summarised)")
    p.add_argument("--json", action="store_true", help="print metadata and points as JSON")
    p.set_defaults(func=cmd_show)

    p = sub.add_parser(
        "replay",
        help="re-run a stored run on the simulated bench and compare, or re-analyse its waveforms",
    )
    p.add_argument("result", help="result file (.h5) of the run to replay")
    p.add_argument("--plan", help="replay this plan instead of the stored one")
    p.add_argument(
        "--device",
        default="learned",
        help='"learned": the device measured in RESULT (default); or a scenario name whose device to use',
    )
    p.add_argument(
        "--reanalyse",
        action="store_true",
        help="recompute the stored points from their raw waveforms (runs made with --keep-waveforms); no bench",
    )
    p.add_argument(
        "--out",
        help="new result file (default: RESULT-replay-<device>.h5, or RESULT-reanalysed.h5)",
    )
    p.add_argument("--force", action="store_true", help="overwrite an existing output file")
    p.add_argument("--seed", type=int, default=0, help="seed of the simulated bench (default 0)")
    p.add_argument("--json", action="store_true", help="print the comparison as JSON")
    p.set_defaults(func=cmd_replay)

    p = sub.add_parser(
        "calibrate", help="measure the scope channels' gain/phase match, both probes on the pin"
    )
    p.add_argument(
        "--plan",
        help="plan whose frequencies, ripple and DC level to calibrate at (required for a real bench)",
    )
    p.add_argument("--bench", help="bench file; omit (or 'sim') for the embedded simulated bench")
    p.add_argument(
        "--out", metavar="CAL.h5", help="calibration file (default: the bench's scope.calibration)"
    )
    p.add_argument("--force", action="store_true", help="replace an existing calibration file")
    p.add_argument("--seed", type=int, default=0, help="seed of the simulated bench (default 0)")
    p.add_argument("--json", action="store_true", help="print the calibration as JSON")
    p.set_defaults(func=cmd_calibrate)

    p = sub.add_parser("report", help="lab report of one or more runs (html, md, csv, pdf, png)")
    p.add_argument(
        "results", nargs="+", metavar="RESULT", help="result file(s) (.h5); several are overlaid"
    )
    p.add_argument(
        "--format",
        choices=("html", "md", "csv", "pdf", "png"),
        help="report format (default: from the -o extension, else html)",
    )
    p.add_argument(
        "-o",
        "--out",
        metavar="PATH",
        help="report file (default: <first result>-report.<ext> beside it)",
    )
    p.add_argument(
        "--model",
        metavar="FILE.cir",
        help="SPICE netlist whose predicted curve (ngspice) is drawn with the measurement",
    )
    p.add_argument(
        "--subcircuit",
        metavar="NAME",
        help="subcircuit of --model; its ports in order: supply pin, output, ground",
    )
    p.add_argument(
        "--model-load",
        default="0 A",
        metavar="CURRENT",
        help="the board's own DC load on the output, added to the run's load (default 0 A)",
    )
    p.add_argument("--json", action="store_true", help="print the files written as JSON")
    p.set_defaults(func=cmd_report)

    p = sub.add_parser(
        "compare",
        help="difference of runs point by point (or a run against a circuit model), with U (k = 2)",
    )
    p.add_argument(
        "results",
        nargs="+",
        metavar="RESULT",
        help="result files (.h5); the first is the reference",
    )
    p.add_argument("--plot", metavar="FILE.png", help="write both curves and the difference ± U")
    p.add_argument(
        "--model", metavar="FILE.cir", help="also compare with this netlist's prediction"
    )
    p.add_argument(
        "--subcircuit", metavar="NAME", help="subcircuit of --model (pin, output, ground)"
    )
    p.add_argument(
        "--model-load",
        default="0 A",
        metavar="CURRENT",
        help="the board's own DC load on the output, added to the run's load (default 0 A)",
    )
    p.add_argument("--all", action="store_true", help="list every row (a long one is summarised)")
    p.add_argument("--json", action="store_true", help="print every matched point as JSON")
    p.set_defaults(func=cmd_compare)

    p = sub.add_parser("scan", help="list reachable VISA instruments and their *IDN?")
    p.add_argument(
        "address",
        nargs="*",
        help="also ask these resources (LAN SOCKET addresses cannot be discovered); "
        "HOST:PORT is short for TCPIP::HOST::PORT::SOCKET",
    )
    p.add_argument("--visa-library", default="@py", help="VISA library (default @py: pyvisa-py)")
    p.add_argument("--timeout", type=float, default=1.0, help="seconds per instrument")
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.set_defaults(func=cmd_scan)

    p = sub.add_parser("sim", help="the simulated bench")
    simsub = p.add_subparsers(dest="sim_command", metavar="ACTION")
    q = simsub.add_parser("serve", help="serve a simulated bench over SCPI/TCP on 127.0.0.1")
    q.add_argument("--scenario", default="demo", help="scenario name (default demo)")
    q.add_argument("--port", type=int, default=5025, help="first TCP port (one per instrument)")
    q.add_argument("--seed", type=int, default=0, help="noise seed")
    q.add_argument(
        "--log", metavar="FILE", help="append every instrument state change to FILE (JSON lines)"
    )
    q.set_defaults(func=cmd_sim_serve)
    _add_watch_parser(sub)
    _add_catalog_parser(sub)
    _verbosity_options(parser, sub)
    return parser


def _verbosity_options(parser: argparse.ArgumentParser, sub: Any) -> None:
    """-q/--quiet and -v/--verbose, before the command or after it (benchseq -v run ...,
    benchseq run ... -v)."""
    for target, default in [(parser, False), *((c, argparse.SUPPRESS) for c in _commands(sub))]:
        group = target.add_mutually_exclusive_group()
        group.add_argument(
            "-q",
            "--quiet",
            action="store_true",
            default=default,
            help="warnings and the final verdict only",
        )
        group.add_argument(
            "-v",
            "--verbose",
            action="store_true",
            default=default,
            help="debug detail too (instrument settings read back, capture decisions)",
        )


def _commands(sub: Any) -> list[argparse.ArgumentParser]:
    """Every command's parser, nested ones (sim serve) included."""
    found = []
    for command in dict.fromkeys(sub.choices.values()):
        found.append(command)
        for action in command._actions:
            if isinstance(action, argparse._SubParsersAction):
                found += _commands(action)
    return found


class _StderrHandler(logging.StreamHandler):  # type: ignore[type-arg]
    """A handler writing to whatever sys.stderr is when a record comes (the live display
    redirects it, to print lines above itself)."""

    def __init__(self) -> None:
        super().__init__()

    @property  # type: ignore[override]
    def stream(self) -> Any:
        return sys.stderr

    @stream.setter
    def stream(self, value: Any) -> None:
        pass


def _attach_console_log(args: argparse.Namespace) -> tuple[logging.Handler, int]:
    """The terminal's log handler (stderr) on the ``benchseq`` logger, at the level -q/-v
    give; returns it and the logger's previous level, to put back."""
    from benchseq.runlog import LineFormatter

    package = logging.getLogger("benchseq")
    previous = package.level
    package.setLevel(logging.DEBUG if args.verbose else logging.INFO)
    handler = _StderrHandler()
    handler.setFormatter(LineFormatter())
    handler.setLevel(
        logging.WARNING if args.quiet else logging.DEBUG if args.verbose else logging.INFO
    )
    args.log_filter = _ConsoleFilter()
    handler.addFilter(args.log_filter)
    package.addHandler(handler)
    return handler, previous


def _json_error(args: argparse.Namespace, error: object, code: int) -> int:
    """With --json, stdout still carries JSON when a command fails: the error and the
    exit code (the message itself went to stderr as without --json)."""
    if getattr(args, "json", False):
        _print_json({"error": str(error), "exit_code": code})
    return code


# BLAS threads for the command's own process. The fits' matrix products are narrow (a
# record's blocks times a few cos/sin columns) and memory-bound: a second OpenBLAS thread
# only adds hand-over and, on a loaded machine, spinning (tests/perf/demo_wall.py).
BLAS_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS")


def one_blas_thread() -> bool:
    """Load numpy with one BLAS thread, when nothing has loaded it yet and the user has not
    set a thread count; returns whether it did.

    OpenBLAS reads its thread count once, when numpy loads it, so this must run before the
    first numpy import: it is called first thing in ``main`` (the `benchseq` command, which
    also serves the simulated bench), never on importing the package. The variables are
    removed again after the import, so the after-run command, ngspice and other children
    inherit the user's environment unchanged."""
    if "numpy" in sys.modules or any(name in os.environ for name in BLAS_THREAD_VARIABLES):
        return False
    for name in BLAS_THREAD_VARIABLES:
        os.environ[name] = "1"
    try:
        import numpy  # noqa: F401  (loads OpenBLAS with the variables set)
    finally:
        for name in BLAS_THREAD_VARIABLES:
            os.environ.pop(name, None)
    return True


def main(argv: Sequence[str] | None = None) -> int:
    one_blas_thread()
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.quiet and args.verbose:
        parser.error("-q/--quiet and -v/--verbose exclude each other")
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_BAD_INPUT
    handler, level = _attach_console_log(args)
    try:
        return int(args.func(args))
    except BadInput as exc:
        _console(stderr=True).print(f"[bold red]error:[/] {_escape(exc)}")
        return _json_error(args, exc, EXIT_BAD_INPUT)
    except BenchseqError as exc:
        _console(stderr=True).print(f"[bold red]failed:[/] {_escape(exc)}")
        return _json_error(args, exc, exc.exit_code)
    except KeyboardInterrupt:
        _console(stderr=True).print("interrupted")
        return _json_error(args, "interrupted", EXIT_FAILURE)
    finally:
        package = logging.getLogger("benchseq")
        package.removeHandler(handler)
        package.setLevel(level)
