"""The result file's HDF5 conventions, checked from outside benchseq.

- ``units``: the attribute name of CF conventions §3.1 and the NetCDF User Guide's attribute
  conventions; files written before it with ``unit`` still read (and resume).
- ``point_id`` is an HDF5 dimension scale attached to dimension 0 of every per-point dataset
  (HDF5 "Dimension Scale Specification and Design Notes", The HDF Group: the scale carries
  CLASS = "DIMENSION_SCALE", NAME and a REFERENCE_LIST; each attached dataset a
  DIMENSION_LIST). The attachment is checked with h5py's ``dims`` and with HDF5's own
  ``H5DSis_attached`` (``h5py.h5ds.is_attached``), which checks both lists.
- No global side effect: importing benchseq leaves the process environment alone (in a
  fresh interpreter), and a reader still reads a file another process holds open for writing
  with HDF5's file lock (h5py's ``locking`` keyword, h5py >= 3.5).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import h5py
import numpy as np
import pytest

from benchseq.store import (
    Column,
    Consolidation,
    RunWriter,
    StoredWaveform,
    read_results,
    read_truth,
    read_waveforms,
    repair_mirror,
)

COLUMNS = [
    Column("point_id", "i8", "", "index of the point"),
    Column("frequency", "f8", "Hz", "injection frequency"),
    Column("pin", "c16", "V (peak)", "pin ripple phasor, peak"),
    Column("load_current", "f8", "A", "load current"),
    Column("flags", "str", "", "space-separated flags"),
]
TRUTH = [
    Column("point_id", "i8", "", "index of the point"),
    Column("rejection_db", "f8", "dB", "true rejection"),
]
META = {"run_id": "fernhollow-rj7-conventions", "status": "running", "device": "FV-33"}
EVERY = Consolidation(every_point=True)
NEVER = Consolidation(min_interval_s=1e9)
CHILD_TIMEOUT_S = 60.0


def _row(i: int) -> dict:
    return {
        "point_id": i,
        "frequency": 100.0 * 2**i,
        "pin": complex(0.05, -0.001 * i),
        "load_current": 0.1 * i,
        "flags": "" if i % 2 else "target_unmet",
    }


def _wave(i: int) -> StoredWaveform:
    codes = (np.arange(50 + 7 * i) % 200 - 100).astype(np.int8)
    return StoredWaveform(codes, scale=0.002, offset=0.0, sample_interval=1e-6)


def _append(writer: RunWriter, ids: range) -> None:
    for i in ids:
        writer.append(i, _row(i), waveforms={"pin": _wave(i)}, truth={"point_id": i,
                      "rejection_db": 50.0 + i})  # fmt: skip


def _per_point_datasets(h5: h5py.File) -> dict[str, list[str]]:
    """Group -> the datasets indexed by point (every 1-D dataset but the scale itself and
    the waveform sample stores)."""
    out: dict[str, list[str]] = {}
    for group in ("points", "truth", *[f"waveforms/{ch}" for ch in h5.get("waveforms", {})]):
        out[group] = [n for n in h5[group] if n not in ("point_id", "samples")]
    return out


def _assert_scaled(path: Path, rows: int) -> None:
    with h5py.File(path, "r", locking=False) as h5:
        groups = _per_point_datasets(h5)
        assert set(groups) == {"points", "truth", "waveforms/pin"}
        for group, names in groups.items():
            scale = h5[f"{group}/point_id"]
            assert scale.is_scale and scale.attrs["CLASS"] == b"DIMENSION_SCALE"
            assert scale.attrs["NAME"] == b"point_id"
            assert len(scale.attrs["REFERENCE_LIST"]) == len(names)
            assert scale.shape == (rows,)
            for name in names:
                ds = h5[f"{group}/{name}"]
                assert ds.shape == (rows,), f"{group}/{name}"
                assert len(ds.dims[0]) == 1 and ds.dims[0][0].name == f"/{group}/point_id"
                assert h5py.h5ds.is_attached(ds.id, scale.id, 0), f"{group}/{name}"
        assert list(h5["points/point_id"][:]) == list(range(rows))


def test_point_id_stays_the_dimension_scale_through_appends_resume_and_repair(tmp_path):
    path = tmp_path / "scaled.h5"
    writer = RunWriter.create(path, META, COLUMNS, truth_columns=TRUTH, policy=EVERY)
    _append(writer, range(4))
    _assert_scaled(path, 4)
    writer.close()  # interrupted: resumed below, the datasets grow by resizing
    writer = RunWriter.resume(path, policy=EVERY)
    _append(writer, range(4, 7))
    _assert_scaled(path, 7)
    writer.policy = NEVER  # the next points only in the journal: the HDF5 file lags
    _append(writer, range(7, 9))
    writer.close()
    outcome = repair_mirror(path)
    assert outcome.repaired and outcome.lagging == ["2 point(s) only in the journal"]
    _assert_scaled(path, 9)
    assert list(read_results(path)["point_id"]) == list(range(9))


def _as_written_before_the_conventions(path: Path) -> None:
    """Turn a file into what the earlier layout wrote: "unit" attributes, no dimension
    scale (the scale's and the datasets' Dimension Scale attributes removed)."""
    with h5py.File(path, "r+", locking=False) as h5:

        def downgrade(name: str, obj: h5py.Group | h5py.Dataset) -> None:
            if "units" in obj.attrs:
                obj.attrs["unit"] = obj.attrs["units"]
                del obj.attrs["units"]
            for attr in ("DIMENSION_LIST", "REFERENCE_LIST", "CLASS", "NAME"):
                if attr in obj.attrs:
                    del obj.attrs[attr]

        h5.visititems(downgrade)
        assert not h5["points/point_id"].is_scale and "units" not in h5["points/frequency"].attrs


def test_a_file_with_the_older_unit_attribute_reads_and_resumes(tmp_path):
    path = tmp_path / "older.h5"
    writer = RunWriter.create(path, META, COLUMNS, truth_columns=TRUTH, policy=EVERY)
    _append(writer, range(3))
    writer.close()
    _as_written_before_the_conventions(path)
    frame = read_results(path)
    assert list(frame["point_id"]) == [0, 1, 2]
    assert frame.attrs["units"] == {c.name: c.unit for c in COLUMNS}
    assert read_truth(path).attrs["units"]["rejection_db"] == "dB"
    assert read_waveforms(path, 2)["pin"].unit == "V"
    writer = RunWriter.resume(path, policy=EVERY)  # brought to today's conventions
    _append(writer, range(3, 5))
    writer.finish("complete")
    _assert_scaled(path, 5)
    with h5py.File(path, "r", locking=False) as h5:
        assert h5["points/pin"].attrs["units"] == "V (peak)"
        assert h5["waveforms/pin"].attrs["units"] == "V"
        assert h5["waveforms/pin/sample_interval"].attrs["units"] == "s"
        assert not [n for n, obj in _items(h5) if "unit" in obj.attrs]
    assert read_results(path).attrs["units"]["load_current"] == "A"


def _items(h5: h5py.File) -> list[tuple[str, h5py.Group | h5py.Dataset]]:
    found: list[tuple[str, h5py.Group | h5py.Dataset]] = []
    h5.visititems(lambda name, obj: found.append((name, obj)))
    return found


def test_importing_benchseq_leaves_the_environment_alone(tmp_path):
    script = textwrap.dedent(
        """
        import json, os
        before = dict(os.environ)
        import benchseq, benchseq.store, benchseq.results, benchseq.calibrate, benchseq.api
        after = dict(os.environ)
        changed = sorted(k for k in before.keys() | after.keys() if before.get(k) != after.get(k))
        print(json.dumps(changed))
        """
    )
    env = {k: v for k, v in os.environ.items() if k != "HDF5_USE_FILE_LOCKING"}
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, env=env,
        timeout=CHILD_TIMEOUT_S, cwd=tmp_path, check=False,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout) == []


HOLDER = """
import sys, h5py
with h5py.File(sys.argv[1], "r+", locking=True) as h5:  # HDF5's exclusive lock, taken
    print("open", flush=True)
    sys.stdin.readline()  # held until the test says
"""


def test_a_file_held_open_for_writing_by_another_process_still_reads(tmp_path):
    path = tmp_path / "held.h5"
    writer = RunWriter.create(path, META, COLUMNS, truth_columns=TRUTH, policy=EVERY)
    _append(writer, range(3))
    writer.close()
    env = {k: v for k, v in os.environ.items() if k != "HDF5_USE_FILE_LOCKING"}
    with subprocess.Popen(
        [sys.executable, "-c", HOLDER, str(path)], stdin=subprocess.PIPE,
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
    ) as holder:  # fmt: skip
        try:
            assert holder.stdout is not None and holder.stdin is not None
            assert holder.stdout.readline().strip() == "open", "the holder did not open the file"
            with pytest.raises(OSError, match="lock"):  # the lock is real for a locking reader
                h5py.File(path, "r", locking=True).close()
            assert list(read_results(path)["point_id"]) == [0, 1, 2]
            resumed = RunWriter.resume(path, policy=EVERY)  # benchseq's own lock guards writers
            _append(resumed, range(3, 4))
            resumed.finish("complete")
            assert list(read_results(path)["point_id"]) == [0, 1, 2, 3]
            holder.stdin.write("done\n")
            holder.stdin.flush()
            assert holder.wait(timeout=CHILD_TIMEOUT_S) == 0
        finally:
            if holder.poll() is None:
                holder.kill()
                holder.wait(timeout=CHILD_TIMEOUT_S)
