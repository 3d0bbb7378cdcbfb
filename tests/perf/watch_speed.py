"""What the live page costs (prints its figures): one full read of a result's state for
`benchseq watch` at several sizes, a running file with its HDF5 file behind the journal
(the points only in the journal) beside one whose HDF5 file holds them, and the answer to a
poll when nothing changed (the cached state).

Run: python tests/perf/watch_speed.py [--points 100,1000,5000]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import threading
import time
import urllib.request
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from report_files import row, write_result

from benchseq.watch import open_server, read_state


def _median_ms(action, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        action()
        times.append(time.perf_counter() - start)
    return 1e3 * float(np.median(times))


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--points", default="100,1000,5000")
    args = parser.parse_args()
    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    with tempfile.TemporaryDirectory() as folder:
        for n in (int(x) for x in args.points.split(",")):
            rows = [row(k, 10 ** (1 + 5 * k / max(n - 1, 1)), 80.0 - k % 60) for k in range(n)]
            done = write_result(Path(folder) / f"done{n}.h5", rows)
            running = write_result(Path(folder) / f"run{n}.h5", rows, status=None)
            state_ms = _median_ms(lambda p=done: read_state(p), 5)
            journal_ms = _median_ms(lambda p=running: read_state(p), 5)
            server = open_server(done)
            thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05})
            thread.start()
            try:
                url = server.url + "state.json"

                def poll(u: str = url) -> None:
                    with urllib.request.urlopen(u, timeout=20) as reply:
                        reply.read()

                poll_ms = _median_ms(poll, 50)
                with urllib.request.urlopen(url, timeout=20) as reply:
                    size = len(reply.read())
            finally:
                server.shutdown()
                server.server_close()
                thread.join(timeout=10)
            print(
                f"{n} points: state read {state_ms:.1f} ms (complete file), {journal_ms:.1f} ms "
                f"(interrupted: read_meta probes the writer lock); cached poll {poll_ms:.2f} ms; "
                f"state.json {size / 1024:.0f} KiB"
            )


if __name__ == "__main__":
    main()
