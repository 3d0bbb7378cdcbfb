"""Fuzzed plan, bench and result files through the command line (a benchmark, not a test).

Each case is a damaged copy of a shipped file: a plan, a bench or a scenario file (a user's
own scenario, named by the bench's ``lab.simulation``) with one to three lines changed (a
value replaced by a nasty one or by one at the edge of its allowed range, a line deleted, a
key misspelt, the text cut or a byte flipped), or a small simulated result file truncated
or with bytes flipped. Each case runs in a forked child with a time limit:

- plan, bench and scenario cases: ``check``; when check refuses (exit 2, or 1 for
  infeasible points), ``run`` must refuse too, without creating a result file and without
  opening the bench; when check accepts a small plan on the simulated bench, ``run`` runs
  it (and must not refuse what check accepted);
- result cases: ``show`` and ``report --format csv``.

Printed: cases tried, exit codes, tracebacks (an exception escaping the command, or
"Traceback" in its output), hangs (a child over its time limit), instruments touched by
refused inputs (bench sessions opened, counted by wrapping the session factory), result
files left by refused inputs, and inputs check accepted but run refused. Target: all 0.

    python tests/perf/fuzz_inputs.py [--cases 150] [--seed 1] [--timeout 60] [--budget 900]
"""

from __future__ import annotations

import argparse
import contextlib
import io
import math
import multiprocessing
import random
import shutil
import sys
import tempfile
import time
import traceback
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[2]
PLAN = ROOT / "plans" / "demo.toml"
SIM_BENCH = ROOT / "sim" / "scenarios" / "demo.bench.toml"
LAB_BENCH = ROOT / "plans" / "bench-template.toml"
SCENARIO = ROOT / "sim" / "scenarios" / "demo.toml"
SMALL_FREQUENCIES = 'frequency = ["1 kHz", "100 kHz"]'
DEMO_FREQUENCIES = 'frequency = { from = "10 Hz", to = "1 MHz", per_decade = 3 }'
MAX_RUN_POINTS = 40  # accepted plans larger than this are checked but not run

NASTY = [
    '"1e9 s"', '"1e-12 V/s"', "1e308", "-1e308", '"10 mHz"', '"1e300 ohm"', '"..x:Y"',
    '"nosuchmodule:Cls"', '"benchseq.units:Amplitude"', "0", "-1", '"nan"', "nan", "inf",
    '"0 Hz"', '"-5 V"', '"1e400 F"', '"4k7"', '"6.4 V"', '"100 V"', '"192.0.2.1:5025"',
    '"TCPIP::192.0.2.1::99999::SOCKET"', '"SIM::scope"', '"../nowhere.toml"', '"no-such"',
    '""', "[]", "{}", "true", '"1 Vpp"', '"10 GHz"', '"1e-300 s"', "123456789012345678901234567890",
    '"1 h"', '"every point"', '["1 kHz", "1 kHz"]', '{ from = "1 Hz", to = "1 GHz", per_decade = 10000 }',
    '"scpi-scope"', '"cal/missing.h5"', '"mine.toml"', "[[1, 2]]", '"\\u0000"',
]  # fmt: skip


@dataclass
class Tally:
    tried: Counter = field(default_factory=Counter)
    tracebacks: list[str] = field(default_factory=list)
    hangs: list[str] = field(default_factory=list)
    touched: list[str] = field(default_factory=list)  # refused inputs that opened the bench
    left_files: list[str] = field(default_factory=list)  # refused inputs that left a file
    mismatches: list[str] = field(default_factory=list)  # check accepted, run refused
    exits: Counter = field(default_factory=Counter)  # "command exit" -> count


# -- making cases ----------------------------------------------------------------------------
def mutate_text(text: str, rng: random.Random) -> str:
    """One to three line-level changes, or one byte-level change."""
    if rng.random() < 0.15:
        raw = bytearray(text.encode("utf-8"))
        if rng.random() < 0.5:
            return raw[: rng.randrange(len(raw))].decode("utf-8", "replace")
        raw[rng.randrange(len(raw))] ^= 1 << rng.randrange(8)
        return raw.decode("utf-8", "replace")
    lines = text.splitlines()
    assignments = [
        i for i, line in enumerate(lines) if "=" in line and not line.lstrip().startswith("#")
    ]
    for _ in range(rng.choice([1, 1, 2, 3])):
        i = rng.choice(assignments)
        key, _, rest = lines[i].partition("=")
        action = rng.random()
        edge = edge_value(lines, i, rng)
        if edge is not None and rng.random() < 0.7:
            lines[i] = f"{key}= {edge}"
        elif action < 0.7:
            lines[i] = f"{key}= {rng.choice(NASTY)}"
        elif action < 0.85:
            lines[i] = ""
        else:
            lines[i] = f"{key.rstrip()}{rng.choice(['s', '_x', 'X'])} ={rest}"
    if rng.random() < 0.2:  # a load axis, which the simulated bench has no load for
        lines = ['load = ["10 mA"]' if line.startswith("# load = [") else line for line in lines]
    return "\n".join(lines) + "\n"


def edge_value(lines: list[str], i: int, rng: random.Random) -> str | None:
    """A value at (or between) the ends of the allowed range of the key on line ``i``, as a
    plain SI number, or None when the key has no range: accepted values a run must handle."""
    from benchseq.ranges import BENCH_RANGES, PLAN_RANGES

    section = ""
    for line in lines[:i]:
        if line.startswith("["):
            section = line.strip().strip("[]").split("]")[0].strip()
    key = lines[i].partition("=")[0].strip()
    full = f"{section}.{key}" if section else key
    found = (
        PLAN_RANGES.get(full)
        or BENCH_RANGES.get(full)
        or BENCH_RANGES.get(key if key == "timeout" else "")
    )
    if found is None or found.unit in ("Vpk", "Vpp"):
        return None
    low = max(found.low, 1e-12) if found.low_open or found.low <= 0 else found.low
    if found.low < 0:
        low = found.low
    choices = [low, found.high]
    if low > 0:
        choices.append(10 ** rng.uniform(math.log10(low), math.log10(found.high)))
    return repr(float(rng.choice(choices)))


def make_result(folder: Path) -> Path:
    """A small complete simulated result to damage."""
    from benchseq.runner import start_run

    plan = folder / "small.toml"
    plan.write_text(PLAN.read_text("utf-8").replace(DEMO_FREQUENCIES, SMALL_FREQUENCIES), "utf-8")
    outcome, path = start_run(str(plan), None, str(folder / "base.h5"), seed=3)
    assert outcome.status == "complete", outcome.reason
    return path


def damage_result(source: Path, target: Path, rng: random.Random) -> None:
    raw = bytearray(source.read_bytes())
    if rng.random() < 0.4:
        raw = raw[: rng.randrange(len(raw))]
    else:
        for _ in range(rng.randint(1, 16)):
            raw[rng.randrange(len(raw))] ^= 1 << rng.randrange(8)
    target.write_bytes(bytes(raw))


# -- running one case (in a forked child) ----------------------------------------------------
def _cli(argv: list[str]) -> tuple[int | str, str]:
    """(exit code or 'traceback', captured output)."""
    from benchseq.cli import main

    buffer = io.StringIO()
    with contextlib.redirect_stdout(buffer), contextlib.redirect_stderr(buffer):
        try:
            code: int | str = main(argv)
        except SystemExit as exc:
            code = int(exc.code or 0)
        except BaseException:
            return "traceback", buffer.getvalue() + traceback.format_exc()
    output = buffer.getvalue()
    return ("traceback" if "Traceback" in output else code), output


def run_case(kind: str, folder: str, report: Any) -> None:
    """Child: run the commands of one case; send a dict of findings through ``report``."""
    import benchseq.drivers.session as session_module

    opened = []
    real_open = session_module.open_session

    def counting_open(bench: Any, seed: int = 0, faults: Any = None) -> Any:
        opened.append(bench.source)
        return real_open(bench, seed=seed, faults=faults)

    session_module.open_session = counting_open
    base = Path(folder)
    found: dict[str, Any] = {"codes": [], "traceback": "", "touched": 0, "left": []}
    # found["codes"]: (command, exit code or "traceback") in the order run
    if kind == "result":
        for argv in (
            ["show", str(base / "case.h5")],
            ["report", str(base / "case.h5"), "--format", "csv", "-o", str(base / "r.csv")],
        ):
            code, output = _cli(argv)
            found["codes"].append((argv[0], code))
            if code == "traceback":
                found["traceback"] = output[-1500:]
                break
        report.send(found)
        return
    plan, bench = str(base / "plan.toml"), str(base / "bench.toml")
    code, output = _cli(["check", plan, "--bench", bench])
    found["codes"].append(("check", code))
    if code == "traceback":
        found["traceback"] = output[-1500:]
    elif code in (1, 2):  # refused by check (bad file, or infeasible points): run refuses too
        out = base / "out" / "run.h5"
        out.parent.mkdir()
        run_code, run_output = _cli(["run", plan, "--bench", bench, "--out", str(out)])
        found["codes"].append(("run", run_code))
        if run_code == "traceback":
            found["traceback"] = run_output[-1500:]
        found["touched"] = len(opened)
        found["left"] = [p.name for p in out.parent.iterdir()]
        found["refused"] = True
    elif kind == "sim" and _small(plan, bench):
        run_code, run_output = _cli(["run", plan, "--bench", bench, "--out", str(base / "run.h5")])
        found["codes"].append(("run", run_code))
        if run_code == "traceback":
            found["traceback"] = run_output[-1500:]
        found["mismatch"] = run_code == 2
    report.send(found)


def _small(plan: str, bench: str) -> bool:
    from benchseq.plan import load_plan

    return load_plan(plan).point_count <= MAX_RUN_POINTS


def one_case(kind: str, folder: Path, timeout_s: float) -> dict[str, Any] | None:
    """Run a case in a forked child; None when it hung (the child is then killed)."""
    context = multiprocessing.get_context("fork")
    receive, send = context.Pipe(duplex=False)
    child = context.Process(target=run_case, args=(kind, str(folder), send), daemon=True)
    child.start()
    send.close()
    found = receive.recv() if receive.poll(timeout_s) else None
    child.join(5.0 if found is not None else 0.0)
    if child.is_alive():
        child.kill()
        child.join(5.0)
    receive.close()
    return found


# -- main ---------------------------------------------------------------------------------------
def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cases", type=int, default=150, help="cases in all (default 150)")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--timeout", type=float, default=60.0, help="seconds per case")
    parser.add_argument("--budget", type=float, default=900.0, help="seconds in all")
    args = parser.parse_args()
    rng = random.Random(args.seed)
    tally = Tally()
    started = time.monotonic()
    with tempfile.TemporaryDirectory(prefix="benchseq-fuzz-") as tmp:
        work = Path(tmp)
        base_result = make_result(work)
        plan_text = PLAN.read_text("utf-8").replace(DEMO_FREQUENCIES, SMALL_FREQUENCIES)
        sim_text, lab_text = SIM_BENCH.read_text("utf-8"), LAB_BENCH.read_text("utf-8")
        scenario_text = SCENARIO.read_text("utf-8")
        for n in range(args.cases):
            if time.monotonic() - started > args.budget:
                break
            folder = work / f"case{n}"
            folder.mkdir()
            kind = rng.choice(["plan", "sim", "lab", "result", "scenario"])
            if kind == "result":
                damage_result(base_result, folder / "case.h5", rng)
            elif kind == "scenario":  # the user's own scenario file, named by the bench
                mine = sim_text.replace('simulation = "demo"', 'simulation = "mine.toml"')
                (folder / "mine.toml").write_text(mutate_text(scenario_text, rng), "utf-8")
                (folder / "plan.toml").write_text(plan_text, "utf-8")
                (folder / "bench.toml").write_text(mine, "utf-8")
            else:
                damaged_plan = kind == "plan" or rng.random() < 0.2
                plan = mutate_text(plan_text, rng) if damaged_plan else plan_text
                bench = lab_text if kind == "lab" else sim_text
                if kind != "plan":
                    bench = mutate_text(bench, rng)
                (folder / "plan.toml").write_text(plan, "utf-8")
                (folder / "bench.toml").write_text(bench, "utf-8")
            run_kind = "sim" if kind in ("plan", "sim", "scenario") else kind
            tally.tried[kind] += 1
            found = one_case(run_kind, folder, args.timeout)
            label = f"case{n} ({kind})"
            if found is None:
                tally.hangs.append(label)
            else:
                tally.exits.update(f"{command} {code}" for command, code in found["codes"])
                if found["traceback"]:
                    tally.tracebacks.append(f"{label}:\n{found['traceback']}")
                if found.get("refused") and found["touched"]:
                    tally.touched.append(label)
                if found.get("refused") and found["left"]:
                    tally.left_files.append(f"{label}: {found['left']}")
                if found.get("mismatch"):
                    tally.mismatches.append(label)
            shutil.rmtree(folder, ignore_errors=True)
    elapsed = time.monotonic() - started
    total = sum(tally.tried.values())
    print(
        f"cases tried: {total} ({', '.join(f'{k} {v}' for k, v in sorted(tally.tried.items()))}) in {elapsed:.0f} s"
    )
    print("exit codes seen: " + ", ".join(f"{k}: {v}" for k, v in sorted(tally.exits.items())))
    print(f"tracebacks: {len(tally.tracebacks)}")
    print(f"hangs (over {args.timeout:g} s): {len(tally.hangs)}")
    print(f"instruments touched by refused inputs: {len(tally.touched)}")
    print(f"result files left by refused inputs: {len(tally.left_files)}")
    print(f"accepted by check but refused by run: {len(tally.mismatches)}")
    shown = tally.tracebacks[:5] + tally.hangs[:5] + tally.touched[:5] + tally.left_files[:5]
    for item in shown + tally.mismatches[:5]:
        print("---", item)
    bad = tally.tracebacks or tally.hangs or tally.touched or tally.left_files or tally.mismatches
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
