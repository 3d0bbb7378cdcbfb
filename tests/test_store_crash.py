"""Crash safety of the results store: SIGKILLed writers, torn and damaged journal records.

A point reported stored (append returned) must survive any kill; a torn or damaged record
must be detected by its checksum and ignored, never loaded as data; resume must finish
the run with every point exactly once.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import textwrap
import threading
import time
import warnings

import numpy as np
import pytest

from benchseq import journal as jr
from benchseq.results import ResultWarning, mirror_lag
from benchseq.store import (
    Column,
    Consolidation,
    RunWriter,
    journal_path,
    read_results,
    read_waveforms,
)

COLUMNS = [
    Column("point_id", "i8", "", "index of the point"),
    Column("frequency", "f8", "Hz", "injection frequency"),
    Column("pin", "c16", "V", "pin ripple phasor"),
    Column("flags", "str", "", "flags"),
]

WRITER_SCRIPT = textwrap.dedent(
    """
    import sys
    import numpy as np
    from benchseq.store import Column, Consolidation, RunWriter, StoredWaveform

    path, total, mode, policy = sys.argv[1], int(sys.argv[2]), sys.argv[3], sys.argv[4]
    columns = [
        Column("point_id", "i8", "", "index of the point"),
        Column("frequency", "f8", "Hz", "injection frequency"),
        Column("pin", "c16", "V", "pin ripple phasor"),
        Column("flags", "str", "", "flags"),
    ]
    chosen = Consolidation(every_point=True) if policy == "every" else Consolidation()
    if mode == "create":
        writer = RunWriter.create(path, {"run_id": "kill-loop"}, columns, policy=chosen)
    else:
        writer = RunWriter.resume(path, policy=chosen)
    print("ready", flush=True)
    for i in range(total):
        if i in writer.stored_ids:
            continue
        row = {"point_id": i, "frequency": 1.25 * i, "pin": complex(i, -2 * i), "flags": f"p{i}"}
        samples = ((np.arange(1500 + 100 * (i % 7)) + i) % 251).astype(np.int16)
        writer.append(i, row, waveforms={"pin": StoredWaveform(samples, scale=1e-3)})
        print(f"stored {i}", flush=True)
    writer.finish("complete")
    print("finished", flush=True)
    """
)


def expected_row(i: int) -> tuple[float, complex, str]:
    return 1.25 * i, complex(i, -2 * i), f"p{i}"


def expected_samples(i: int) -> np.ndarray:
    return ((np.arange(1500 + 100 * (i % 7)) + i) % 251).astype(np.int16)


def check_intact(path, reported: set[int], waveforms_of: int = 3) -> set[int]:
    """Every reported point present, every loaded row exact, no duplicates; the ids loaded."""
    frame = read_results(path)
    ids = [int(i) for i in frame["point_id"]]
    assert len(ids) == len(set(ids)), "duplicate points"
    assert reported <= set(ids), f"lost acknowledged points {sorted(reported - set(ids))}"
    for i, f, pin, flags in zip(ids, frame["frequency"], frame["pin"], frame["flags"], strict=True):
        assert (f, pin, flags) == expected_row(i), f"point {i} damaged"
    for i in random.Random(len(ids)).sample(ids, min(waveforms_of, len(ids))):
        assert np.array_equal(read_waveforms(path, i)["pin"].samples, expected_samples(i))
    return set(ids)


class Writer:
    """The writer script as a subprocess; its stdout lines collected by a thread."""

    def __init__(self, script, path, total, mode, policy):
        self.errors = script.with_suffix(".stderr")
        with open(self.errors, "w") as stderr:
            self.proc = subprocess.Popen(
                [sys.executable, str(script), str(path), str(total), mode, policy],
                stdout=subprocess.PIPE,
                stderr=stderr,
                text=True,
            )
        self.lines: list[str] = []
        self.ready = threading.Event()
        self.thread = threading.Thread(target=self._read, daemon=True)
        self.thread.start()

    def _read(self):
        for line in self.proc.stdout:
            self.lines.append(line.strip())
            if line.startswith("ready"):
                self.ready.set()
        self.ready.set()

    def stored(self) -> set[int]:
        return {int(x.split()[1]) for x in list(self.lines) if x.startswith("stored ")}

    def stderr(self) -> str:
        return self.errors.read_text()

    def wait(self, timeout: float) -> None:
        try:
            self.proc.wait(timeout=timeout)
        finally:
            if self.proc.poll() is None:  # bounded: never leave the writer running
                os.kill(self.proc.pid, signal.SIGKILL)
                self.proc.wait(timeout=10)
            self.thread.join(timeout=10)
            self.proc.stdout.close()

    def kill(self):
        os.kill(self.proc.pid, signal.SIGKILL)
        self.wait(timeout=10)


@pytest.mark.slow
def test_sigkill_at_random_moments_loses_no_acknowledged_point(tmp_path):
    """12 SIGKILLs at random times and at write boundaries; then resume completes exactly."""
    script = tmp_path / "writer.py"
    script.write_text(WRITER_SCRIPT)
    path = tmp_path / "killed.h5"
    total = 400
    rng = random.Random(20240611)
    reported: set[int] = set()
    kills = 0
    for attempt in range(12):
        writer = Writer(
            script,
            path,
            total,
            "create" if attempt == 0 else "resume",
            rng.choice(["every", "auto"]),
        )
        assert writer.ready.wait(timeout=60), writer.stderr()
        assert writer.proc.poll() is None, writer.stderr()
        if attempt % 2:
            time.sleep(rng.uniform(0.0, 0.25))  # a random moment
        else:
            target = len(writer.stored()) + rng.randint(1, 8)  # just after an append returned
            deadline = time.monotonic() + 30
            while len(writer.stored()) < target and time.monotonic() < deadline:
                time.sleep(0.0005)
        writer.kill()
        kills += 1
        assert writer.proc.returncode == -signal.SIGKILL
        reported |= writer.stored()
        assert path.exists() and journal_path(path).exists()
        loaded = check_intact(path, reported)
        assert len(loaded) < total, "the run should still be unfinished (grow total)"
    assert kills >= 10
    final = Writer(script, path, total, "resume", "auto")
    final.wait(timeout=120)
    assert final.proc.returncode == 0, final.stderr()
    assert "finished" in final.lines
    assert check_intact(path, reported | final.stored(), waveforms_of=10) == set(range(total))
    assert journal_path(path).exists()  # kept after completion, the HDF5 file fully caught up
    assert mirror_lag(path) == []


# -- torn and damaged journal records ----------------------------------------------------------
@pytest.fixture()
def lagging_run(tmp_path):
    """A run of 15 points whose HDF5 file holds none of them: the journal carries them all."""
    path = tmp_path / "torn.h5"
    writer = RunWriter.create(path, {"run_id": "torn"}, COLUMNS, policy=Consolidation(1e-9, 1e9))
    for i in range(15):
        row = dict(zip(["frequency", "pin", "flags"], expected_row(i), strict=True))
        writer.append(i, row, waveforms={"pin": expected_samples(i)})
    writer.close()
    records = jr.scan(journal_path(path)).records
    ends = {int(r.body["id"]): (r.start, r.end) for r in records if r.body["kind"] == "point"}
    return path, journal_path(path).read_bytes(), ends


def test_truncated_journal_loads_exactly_the_whole_records(lagging_run):
    path, pristine, spans = lagging_run
    first = min(start for start, _ in spans.values())
    rng = random.Random(5)
    offsets = [rng.randrange(first, len(pristine)) for _ in range(25)]
    offsets += [end for _, end in spans.values()][:3] + [end - 1 for _, end in spans.values()][:3]
    ends = {end for _, end in spans.values()} | {first}
    for offset in offsets:
        journal_path(path).write_bytes(pristine[:offset])
        whole = {i for i, (_, end) in spans.items() if end <= offset}
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", ResultWarning)
            assert check_intact(path, whole, waveforms_of=2) == whole, f"cut at byte {offset}"
        said = {str(w.message) for w in caught if w.category is ResultWarning}
        if offset in ends:
            assert not said, f"cut at byte {offset}: a clean end reported as damage"
        else:  # a torn last record is reported, never skipped silently
            assert said and all("1 journal record(s) unreadable" in m for m in said), said
    # resume cuts the torn tail, then appends cleanly after the last whole record
    cut = spans[9][1] + 7
    journal_path(path).write_bytes(pristine[:cut])
    writer = RunWriter.resume(path)
    assert writer.stored_ids == set(range(10))
    after_cut = [r for r in jr.scan(journal_path(path)).records if r.start >= spans[9][1]]
    assert after_cut[0].start == spans[9][1], "the torn tail is cut off"
    assert [r.body["kind"] for r in after_cut] == ["meta"]  # the resumed session, recorded
    assert after_cut[0].body["items"]["sessions"][-1]["points_at_start"] == 10
    for i in range(10, 15):
        row = dict(zip(["frequency", "pin", "flags"], expected_row(i), strict=True))
        writer.append(i, row, waveforms={"pin": expected_samples(i)})
    writer.finish("complete")
    assert check_intact(path, set(range(15)), waveforms_of=15) == set(range(15))


def test_flipped_byte_drops_only_the_damaged_record(lagging_run):
    path, pristine, spans = lagging_run
    first = min(start for start, _ in spans.values())
    rng = random.Random(11)
    for _ in range(30):
        position = rng.randrange(first, len(pristine))
        damaged = bytearray(pristine)
        damaged[position] ^= rng.randrange(1, 256)
        journal_path(path).write_bytes(bytes(damaged))
        hit = {i for i, (start, end) in spans.items() if start <= position < end}
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", ResultWarning)
            assert check_intact(path, set(spans) - hit, waveforms_of=2) == set(spans) - hit
        said = {str(w.message) for w in caught if w.category is ResultWarning}
        assert said and all("journal record(s) unreadable" in m for m in said), said
