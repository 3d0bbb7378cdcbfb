"""What the campaign catalog costs (prints its figures): a full build per result file, a
rebuild with nothing changed (content hashes only) per file, and each named summary and a
plain SQL count over the built catalog, at several campaign sizes.

Run: python tests/perf/catalog_speed.py [--files 200,1000]
"""

from __future__ import annotations

import argparse
import contextlib
import io
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from test_catalog import write_campaign

from benchseq.cli import main as cli


def _seconds(argv: list[str]) -> float:
    start = time.perf_counter()
    with contextlib.redirect_stdout(io.StringIO()):
        code = cli(argv)
    elapsed = time.perf_counter() - start
    assert code == 0, argv
    return elapsed


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--files", default="200")
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()
    print(f"{'files':>6} {'write/file':>11} {'build/file':>11} {'rebuild/file':>13}  queries (median)")
    for count in (int(n) for n in args.files.split(",")):
        with tempfile.TemporaryDirectory() as tmp:
            results, cat = Path(tmp) / "results", Path(tmp) / "cat"
            start = time.perf_counter()
            write_campaign(results, count=count)
            write = (time.perf_counter() - start) / count
            build = _seconds(["catalog", "build", str(results), "--into", str(cat), "--json"])
            again = _seconds(["catalog", "build", str(results), "--into", str(cat), "--json"])
            queries = {
                "runs": ["runs"],
                "worst": ["worst", "--frequency", "1 kHz", "--dc", "5 V"],
                "flags": ["flags"],
                "sql count": ["--sql", "SELECT count(*) FROM points"],
            }
            timed = []
            for name, extra in queries.items():
                argv = ["catalog", "query", str(cat), *extra, "--json"]
                ms = 1e3 * float(np.median([_seconds(argv) for _ in range(args.repeats)]))
                timed.append(f"{name} {ms:.0f} ms")
            print(
                f"{count:>6} {1e3 * write:>9.0f}ms {1e3 * build / count:>9.0f}ms "
                f"{1e3 * again / count:>11.1f}ms  " + ", ".join(timed)
            )


if __name__ == "__main__":
    main()
