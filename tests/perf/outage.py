"""Outage benchmark (a benchmark script, not a test): network outages at random moments
during runs over TCP, and what the bench was left in.

The simulated bench is served on 127.0.0.1 (benchseq.sim.server.serve, with its
state-change log); `benchseq run` runs in its own process through a proxy
(tests/outageproxy.py) that, at a random moment (seeded) during the run, resets every
connection and refuses new ones for the outage's length. After the run has exited and the
link is back, the instruments themselves are asked (straight to the server, not through
benchseq) whether their outputs are on; the server's log gives the same answer.

Prints, for each outage length: runs that rode through (exit 0, every point stored), runs
that stopped safely (not complete, every output off), benches left energised (an output
still on after the run ended), and runs where an output was left on that benchseq did not
report (must be 0 for every length: benchseq may list more than is on, never less). With the bench's outage patience P, an outage shorter than P must leave no
bench energised; one longer than 2 P (riding through, then the safe state, each give up
after P) cannot be helped and must be reported (exit 1, listed as not made safe).

    python tests/perf/outage.py [--patience 20] [--lengths 0.5,2,10,30,60]
        [--runs 4,4,3,2,2] [--seed 1]

Bounded: every run has a time limit (its patience twice plus the plan's time plus a
margin) and is ended by its pid; the 60 s outages make this take several minutes.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import signal
import socket
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # tests/: the proxy

from outageproxy import OutageProxy

from benchseq.bench import load_bench
from benchseq.sim.server import read_state_log, serve, tcp_bench_text

SCENARIO = "amplifier"
SWITCHES = {"generator": "OUTP1?", "load": "INP1?", "supply": "OUTP1?"}
OFF = {"generator": "OUTP1 OFF", "load": "INP1 OFF", "supply": "OUTP1 OFF"}
PLAN = """
title = "AB-10 amplifier board: outage benchmark"
[device]
name = "AB-10 gain-of-10 amplifier board (simulated)"
absolute_max = "5.5 V"
min_operating = "3 V"
[sweep]
dc = ["5 V"]
ripple = ["200 mVpp"]
load = ["20 mA"]
frequency = ["1 kHz", "10 kHz", "100 kHz"]
[settle]
after_operating_point = "0.2 s"
[capture]
max_time = "0.5 s"
target_uncertainty = "0.3 dB"
"""
POINTS = 3


@dataclass
class Result:
    length: float
    at: float  # s after the supply went on
    exit_code: int
    status: str
    complete: bool
    claimed_not_safe: list[str]
    energised: dict[str, bool]  # asked of the instruments after the run
    log_energised: dict[str, bool]  # the last switch state in the server's log
    missed: bool  # the outage began after the run had made the bench safe: it met nothing
    active_s: float  # from the supply switching on to the run's last state change


def ask(port: int, command: str) -> str:
    with socket.create_connection(("127.0.0.1", port), timeout=5.0) as conn:
        conn.sendall(command.encode("ascii") + b"\n")
        if not command.endswith("?"):
            return ""
        reply = b""
        while not reply.endswith(b"\n"):
            chunk = conn.recv(4096)
            if not chunk:
                break
            reply += chunk
    return reply.decode("ascii").strip()


def last_switches(log: Path, after: int) -> dict[str, bool]:
    return last_switches_of(read_state_log(log)[after:])


def last_switches_of(entries: list[dict[str, Any]]) -> dict[str, bool]:
    """Each output's last logged state (off when never switched)."""
    state = dict.fromkeys(SWITCHES, False)
    for entry in entries:
        if entry["what"] in ("output", "input") and entry["role"] in state:
            state[entry["role"]] = bool(entry["value"])
    return state


def supply_on_since(log: Path, after: int) -> bool:
    return any(
        e["role"] == "supply" and e["what"] == "output" and e["value"]
        for e in read_state_log(log)[after:]
    )


def one_run(
    folder: Path,
    server: Any,
    log: Path,
    proxy: OutageProxy,
    bench: Path,
    length: float,
    at: float,
    limit_s: float,
    tag: str,
) -> Result:
    mark = len(read_state_log(log))
    out = folder / f"{tag}.h5"
    text = folder / f"{tag}.stdout"
    with open(text, "wb") as sink, open(text.with_suffix(".stderr"), "wb") as err:
        proc = subprocess.Popen(
            [sys.executable, "-m", "benchseq", "run", str(folder / "plan.toml"), "--bench",
             str(bench), "--out", str(out), "--json", "--force"],
            stdout=sink, stderr=err, cwd=folder,
        )  # fmt: skip
    started = time.monotonic()
    fired = False
    fired_wall = float("inf")
    try:
        while proc.poll() is None and time.monotonic() - started < limit_s:
            if not fired and supply_on_since(log, mark):
                on_at = time.monotonic()
                while proc.poll() is None and time.monotonic() < on_at + at:
                    time.sleep(0.01)
                if proc.poll() is None and length > 0:
                    fired_wall = time.time()
                    proxy.outage(length)
                fired = True
            time.sleep(0.02)
        if proc.poll() is None:
            proc.wait(timeout=max(0.0, limit_s - (time.monotonic() - started)))
    except subprocess.TimeoutExpired:
        pass
    finally:
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait(timeout=10)
    proxy.wait_up(length + 5.0)
    time.sleep(0.3)  # let the server's last writes reach its log
    entries = read_state_log(log)[mark:]
    supply_on = next(
        (e["wall"] for e in entries if e["role"] == "supply" and e["what"] == "output"), 0.0
    )
    last_change = max((e["wall"] for e in entries), default=0.0)
    before = [e for e in entries if e["wall"] < fired_wall]
    safe_before = any(e["what"] in ("output", "input") for e in before) and not any(
        last_switches_of(before).values()
    )
    output = text.read_text(encoding="utf-8", errors="replace")
    try:
        outcome = json.loads(output)  # stdout is the outcome alone
    except ValueError:
        outcome = {"status": f"no outcome (exit {proc.returncode})", "measured": 0}
    energised = {role: ask(server.ports[role], q) == "1" for role, q in SWITCHES.items()}
    result = Result(
        length=length,
        at=at,
        exit_code=proc.returncode,
        status=str(outcome["status"]),
        complete=outcome["status"] == "complete",
        claimed_not_safe=list(outcome.get("not_safe", [])),
        energised=energised,
        log_energised=last_switches(log, mark),
        missed=length > 0 and fired_wall > last_change and safe_before,
        active_s=max(0.0, last_change - supply_on),
    )
    for role, command in OFF.items():  # the operator switches off what was left on
        ask(server.ports[role], command)
    return result


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--patience", type=float, default=20.0, help="lab.outage_patience (s)")
    parser.add_argument("--lengths", default="0.5,2,10,30,60", help="outage lengths (s)")
    parser.add_argument("--runs", default="4,4,3,2,2", help="runs per outage length")
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    lengths = [float(x) for x in args.lengths.split(",")]
    runs = [int(x) for x in args.runs.split(",")]
    if len(runs) != len(lengths):
        parser.error("--runs needs one count per outage length")
    rng = random.Random(args.seed)
    with tempfile.TemporaryDirectory(prefix="benchseq-outage-") as tmp:
        folder = Path(tmp)
        log = folder / "states.jsonl"
        (folder / "plan.toml").write_text(PLAN, encoding="utf-8")
        server = serve(SCENARIO, log=log, seed=args.seed)
        proxy = OutageProxy(server.ports)
        try:
            addresses = {r: f"TCPIP::127.0.0.1::{p}::SOCKET" for r, p in proxy.ports.items()}
            text = tcp_bench_text(load_bench(f"sim:{SCENARIO}").text, addresses, SCENARIO)
            text = text.replace("[lab]\n", f'[lab]\noutage_patience = "{args.patience:g} s"\n', 1)
            bench = folder / "bench.toml"
            bench.write_text(text, encoding="utf-8")
            t0 = time.monotonic()
            base = one_run(folder, server, log, proxy, bench, 0.0, 0.0, 120.0, "baseline")
            span = time.monotonic() - t0
            window = base.active_s
            print(
                f"baseline run without outage: {base.status}, exit {base.exit_code}, "
                f"{span:.1f} s wall, {window:.1f} s from the supply on to the safe state; "
                f"outage patience {args.patience:g} s; plan of {POINTS} points; outages start "
                "at a uniformly random moment in that window (seed "
                f"{args.seed})"
            )
            results: list[Result] = []
            for length, count in zip(lengths, runs, strict=True):
                for k in range(count):
                    at = rng.uniform(0.0, window)
                    limit = span + 2 * args.patience + length + 60.0
                    tag = f"out{length:g}-{k}"
                    r = one_run(folder, server, log, proxy, bench, length, at, limit, tag)
                    results.append(r)
                    left = [role for role, on in r.energised.items() if on]
                    print(
                        f"  outage {length:>5g} s at +{at:5.2f} s"
                        f"{' (after the bench was safe)' if r.missed else ''}: exit {r.exit_code}, "
                        f"{r.status}; left on: {', '.join(left) or 'nothing'}; "
                        f"benchseq reported not safe: "
                        f"{', '.join(x.split(':')[0] for x in r.claimed_not_safe) or 'nothing'}"
                    )
            print()
            header = (
                f"{'outage':>8} {'runs':>5} {'rode through':>13} {'stopped safely':>15} "
                f"{'left energised':>15} {'left unreported':>17} {'outage missed':>14}"
            )
            print(header)
            for length in lengths:
                every = [r for r in results if r.length == length]
                mine = [r for r in every if not r.missed]
                rode = sum(r.complete and r.exit_code == 0 and not any(r.energised.values())
                           for r in mine)  # fmt: skip
                energised = sum(any(r.energised.values()) for r in mine)
                stopped = sum(not r.complete and not any(r.energised.values()) for r in mine)
                # an instrument left on that benchseq did not list as not made safe, or a
                # bench left on with exit 0: a false claim of safety
                unreported = sum(
                    bool({role for role, on in r.energised.items() if on}
                         - {x.split(":")[0] for x in r.claimed_not_safe})
                    or (r.exit_code == 0 and any(r.energised.values()))
                    or r.energised != r.log_energised
                    for r in mine
                )  # fmt: skip
                print(
                    f"{length:>7g}s {len(mine):>5} {rode:>13} {stopped:>15} {energised:>15} "
                    f"{unreported:>17} {len(every) - len(mine):>14}"
                )
            print(
                "(runs: outages that met the run; 'left unreported': an output on after the run "
                "that benchseq did not list as not made safe, or on with exit 0, or the log "
                "disagreeing with the instruments; 'outage missed': began after the run had "
                "made the bench safe, not counted)"
            )
            short = [r for r in results if r.length < args.patience]
            bad = sum(any(r.energised.values()) for r in short)
            print(
                f"\nbenches left energised after outages shorter than the patience "
                f"({args.patience:g} s): {bad} of {len(short)} runs"
            )
            return 1 if bad else 0
        finally:
            proxy.stop()
            server.stop()


if __name__ == "__main__":
    sys.exit(main())
