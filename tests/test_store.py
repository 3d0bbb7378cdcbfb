"""The results store as a specification: round trip, partial runs, resume, bad input.

External references: files are read back with plain h5py (the HDF5 bindings) and
compared with pandas' own frame comparison; the journal's record checksum is CRC-32
(ISO-HDLC, the zlib polynomial), whose published check value for the ASCII text
"123456789" is 0xCBF43926 (CRC RevEng catalogue, "CRC-32/ISO-HDLC").
"""

from __future__ import annotations

import errno
import json
import math
import os
import struct
import threading
import time

import h5py
import numpy as np
import pandas as pd
import pytest

from benchseq import journal as jr
from benchseq import store
from benchseq.errors import BadInput
from benchseq.store import (
    Column,
    Consolidation,
    RunWriter,
    StoredWaveform,
    journal_path,
    read_meta,
    read_results,
    read_truth,
    read_waveforms,
)

COLUMNS = [
    Column("point_id", "i8", "", "index of the point"),
    Column("frequency", "f8", "Hz", "injection frequency"),
    Column("pin", "c16", "V", "pin ripple phasor, peak"),
    Column("is_bound", "bool", "", "only a bound is known"),
    Column("flags", "str", "", "space-separated flags"),
    Column("averages", "i8", "", "records averaged"),
]
TRUTH = [
    Column("point_id", "i8", "", "index of the point"),
    Column("rejection_db", "f8", "dB", "true rejection"),
    Column("output", "c16", "V", "true output phasor"),
]
EVERY = Consolidation(every_point=True)
NEVER = Consolidation(min_interval_s=1e9)  # HDF5 only at create and finish: journal carries the run
META = {
    "run_id": "run-fernhollow-bay2-0001",
    "schema_version": 1,
    "software": "benchseq 0.1.0",
    "status": "running",
    "plan_text": "# Fernhollow bay 2 overnight sweep\n" + "frequency = '10 Hz .. 1 MHz'\n" * 400,
    "plan_sha256": "0" * 64,
    "injector": {"input_resistor": 1000.0, "coupling_capacitor": 4.7e-6, "board": "RJ-7"},
    "identities": {"scope": "SIM,SCOPE,0,1"},
    "point_count": 12,
}


def row_for(i: int) -> dict:
    """A deterministic row exercising every kind, NaN, infinities and unicode."""
    special = [math.nan, math.inf, -math.inf, -0.0]
    return {
        "point_id": i,
        "frequency": special[i % 4] if i % 5 == 4 else 10.0 * 1.7**i,
        "pin": complex(0.1 * i, -0.03 * i) if i % 3 else complex(math.nan, 0.0),
        "is_bound": i % 2 == 0,
        "flags": "" if i % 3 else "bound distorted Ω µ",
        "averages": 2**40 + i,
    }


def truth_for(i: int) -> dict:
    return {"point_id": i, "rejection_db": 60.0 + i, "output": complex(1e-4, 2e-5 * i)}


def expected_frame(ids) -> pd.DataFrame:
    rows = [row_for(i) for i in ids]
    data = {
        c.name: np.array([r[c.name] for r in rows], dtype=store._DTYPES[c.kind]) for c in COLUMNS
    }
    return pd.DataFrame(data, columns=[c.name for c in COLUMNS])


def write_run(path, n, policy=EVERY, **kwargs) -> RunWriter:
    writer = RunWriter.create(path, META, COLUMNS, truth_columns=TRUTH, policy=policy, **kwargs)
    for i in range(n):
        writer.append(i, row_for(i), truth=truth_for(i))
    return writer


def assert_same(frame: pd.DataFrame, ids) -> None:
    pd.testing.assert_frame_equal(frame, expected_frame(ids), check_dtype=False)
    for c in COLUMNS:
        assert frame[c.name].to_numpy().dtype.kind == np.dtype(store._DTYPES[c.kind]).kind or (
            c.kind == "str"
        )


# -- round trip -----------------------------------------------------------------------------
def test_round_trip_every_column_kind_and_meta(tmp_path):
    path = tmp_path / "sweep.h5"
    writer = write_run(path, 12)
    writer.update_meta(identities={"scope": "SIM,SCOPE,0,1", "supply": "SIM,SUPPLY,0,1"})
    writer.finish("complete")
    assert journal_path(path).exists(), "the journal stays as the durable second record"
    assert_same(read_results(path), range(12))
    journal_path(path).rename(tmp_path / "aside.journal")  # the HDF5 file alone holds it all
    assert_same(read_results(path), range(12))
    meta = read_meta(path)
    assert meta["plan_text"] == META["plan_text"] and meta["injector"] == META["injector"]
    assert meta["status"] == "complete" and meta["identities"]["supply"] == "SIM,SUPPLY,0,1"
    truth = read_truth(path)
    assert list(truth["point_id"]) == list(range(12))
    assert np.allclose(truth["output"].to_numpy(), [truth_for(i)["output"] for i in range(12)])


def test_plain_h5py_reads_units_complex_and_meta(tmp_path):
    """Nothing benchseq-specific is needed to read the file (h5py alone)."""
    path = tmp_path / "sweep.h5"
    write_run(path, 5).finish("stopped", reason="operator stop")
    with h5py.File(path, "r", locking=False) as h5:
        assert h5.attrs["format"] == "benchseq-result"
        assert h5.attrs["run_id"] == META["run_id"] and h5.attrs["status"] == "stopped"
        assert h5.attrs["point_count"] == 12 and h5.attrs["reason"] == "operator stop"
        points = h5["points"]
        assert json.loads(points.attrs["columns"]) == [c.name for c in COLUMNS]
        assert points["frequency"].attrs["units"] == "Hz"
        assert points["pin"].attrs["units"] == "V" and points["pin"].dtype == np.complex128
        assert points["pin"][1] == complex(0.1, -0.03)
        assert list(points["point_id"][:]) == list(range(5))
        assert points["flags"].asstr()[0] == "bound distorted Ω µ"
        assert h5["meta/plan_text"].asstr()[()] == META["plan_text"]
        assert json.loads(h5["meta/injector"].asstr()[()]) == META["injector"]
        assert json.loads(h5["meta/json"].asstr()[()])["status"] == "stopped"
        assert h5["truth/rejection_db"].attrs["units"] == "dB"
        assert "groups per point" and len(h5["points"]) == len(COLUMNS) + 1  # + row_crc32


def test_waveforms_ragged_per_channel_with_scaling(tmp_path):
    path = tmp_path / "waves.h5"
    writer = RunWriter.create(path, META, COLUMNS, policy=EVERY)
    rng = np.random.default_rng(7)
    records = {}
    for i in range(6):
        codes = rng.integers(-128, 128, size=100 + 37 * i).astype(np.int8)
        records[i] = codes
        wave = StoredWaveform(codes, scale=0.004, offset=-0.01, sample_interval=1e-6)
        writer.append(i, row_for(i), waveforms={"pin": wave, "output": codes.astype(np.int16)})
        if i == 3:  # points 4 and 5 are read from the journal while the file lacks them
            writer.policy = NEVER
    for i, codes in records.items():
        got = read_waveforms(path, i)
        assert np.array_equal(got["pin"].samples, codes)
        assert np.allclose(got["pin"].values(), codes * 0.004 - 0.01)
        assert got["pin"].sample_interval == 1e-6 and got["output"].samples.dtype == np.int16
    writer.finish("complete")
    with h5py.File(path, "r", locking=False) as h5:
        samples = h5["waveforms/pin/samples"]
        assert samples.compression == "gzip" and samples.chunks is not None
        start, length = h5["waveforms/pin/start"][5], h5["waveforms/pin/length"][5]
        assert np.array_equal(samples[start : start + length], records[5])
    with pytest.raises(store.MissingPoint):
        read_waveforms(path, 99)


def test_journal_checksum_is_standard_crc32():
    """CRC-32/ISO-HDLC check value of b"123456789" is 0xCBF43926 (CRC RevEng catalogue)."""
    body = {"kind": "meta"}
    record = jr.encode_record(body, b"")
    magic, length, payload_crc, head_crc = struct.unpack_from("<4sQII", record)
    payload = record[jr.HEAD_SIZE :]
    assert magic == jr.RECORD_MAGIC and length == len(payload)
    import zlib

    assert zlib.crc32(b"123456789") == 0xCBF43926
    assert payload_crc == zlib.crc32(payload) and head_crc == zlib.crc32(record[:16])


# -- partial runs and resume ------------------------------------------------------------------
def test_partial_run_loads_journal_points_missing_from_hdf5(tmp_path):
    path = tmp_path / "partial.h5"
    writer = write_run(path, 9, policy=NEVER)
    writer.update_meta(status="running", note="bay 2 door opened")
    with h5py.File(path, "r", locking=False) as h5:
        assert h5["points/point_id"].shape == (0,), "the HDF5 file lags on purpose here"
    assert_same(read_results(path), range(9))
    assert read_meta(path)["note"] == "bay 2 door opened"
    assert list(read_truth(path)["rejection_db"]) == [60.0 + i for i in range(9)]
    writer.close()


def test_resume_gives_stored_ids_and_refuses_duplicates(tmp_path):
    path = tmp_path / "resume.h5"
    write_run(path, 4).close()
    writer = RunWriter.resume(path)
    assert writer.stored_ids == {0, 1, 2, 3}
    assert writer.last_row()["point_id"] == 3
    with pytest.raises(store.DuplicatePoint):
        writer.append(2, row_for(2))
    for i in range(4, 7):
        writer.append(i, row_for(i), truth=truth_for(i))
    writer.finish("complete")
    frame = read_results(path)
    assert_same(frame, range(7))
    assert frame["point_id"].is_unique


def test_stopped_run_copied_without_journal_still_loads_and_resumes(tmp_path):
    path = tmp_path / "stopped.h5"
    write_run(path, 3).finish("stopped")
    assert journal_path(path).exists(), "a stopped run keeps its journal for resume"
    alone = tmp_path / "copy.h5"
    alone.write_bytes(path.read_bytes())
    assert_same(read_results(alone), range(3))
    writer = RunWriter.resume(alone)
    assert writer.stored_ids == {0, 1, 2}
    writer.append(3, row_for(3))
    writer.finish("complete")
    assert_same(read_results(alone), range(4))


def test_resume_rebuilds_a_damaged_hdf5_from_the_journal(tmp_path):
    path = tmp_path / "damaged.h5"
    write_run(path, 5).close()
    path.write_bytes(path.read_bytes()[:300])
    assert_same(read_results(path), range(5))  # the journal alone carries the run
    writer = RunWriter.resume(path)
    writer.append(5, row_for(5))
    writer.finish("complete")
    assert_same(read_results(path), range(6))


def test_consolidation_policy_bounds_the_share_of_time(tmp_path):
    """With a small share, the file is updated less often, yet nothing is missing on read."""
    path = tmp_path / "policy.h5"
    writer = write_run(path, 40, policy=Consolidation(max_share=0.001))
    with h5py.File(path, "r", locking=False) as h5:
        in_file = h5["points/point_id"].shape[0]
    assert in_file < 40
    assert_same(read_results(path), range(40))
    writer.finish("complete")
    with h5py.File(path, "r", locking=False) as h5:
        assert h5["points/point_id"].shape[0] == 40


class _SteppedClock:
    """The store's ``time`` with ``monotonic`` moved on only by the test (no wall clock)."""

    def __init__(self) -> None:
        self.now = 1000.0

    def monotonic(self) -> float:
        return self.now

    def __getattr__(self, name: str):
        return getattr(time, name)


@pytest.mark.parametrize(("pace_s", "bound"), [(2.0, "cost"), (30.0, "lag")])
def test_default_policy_bounds_the_mirror_cost_and_lag(tmp_path, monkeypatch, pace_s, bound):
    """The default policy's stated bounds: HDF5 updates during the run cost at most
    ``cost_ratio`` times the journal appends they follow, unless the file would be more than
    ``max_lag_s`` of bench time behind; every durable point reads at every step meanwhile.
    The clock is stepped by the test: a journal append "takes" 1 ms, an update 10 ms."""
    clock = _SteppedClock()
    monkeypatch.setattr(store, "time", clock)
    path = tmp_path / "paced.h5"
    policy = Consolidation()
    writer = RunWriter.create(path, META, COLUMNS, truth_columns=TRUTH, policy=policy)
    journal_append, bring = writer._journal.append, writer._bring_up_to_date
    spent = {"journal": 0.0, "updates": []}

    def slow_append(*args, **kwargs):
        clock.now += 1e-3
        spent["journal"] += 1e-3
        return journal_append(*args, **kwargs)

    def slow_update(*args, **kwargs):
        clock.now += 10e-3
        spent["updates"].append(clock.now)
        return bring(*args, **kwargs)

    monkeypatch.setattr(writer._journal, "append", slow_append)
    monkeypatch.setattr(writer, "_bring_up_to_date", slow_update)
    for i in range(40):
        writer.append(i, row_for(i), truth=truth_for(i))
        assert_same(read_results(path), range(i + 1))  # the journal's tail merged
        clock.now += pace_s
    updates = spent["updates"]
    assert 1 < len(updates) < 40, "updated after every point, or never"
    if bound == "cost":  # points come fast enough for the cost bound to decide
        assert 10e-3 * len(updates) <= policy.cost_ratio * spent["journal"] + 10e-3
    gaps = np.diff(updates)
    assert np.all(gaps <= policy.max_lag_s + pace_s + 1.0)  # never far behind
    with h5py.File(path, "r", locking=False) as h5:
        in_file = h5["points/point_id"].shape[0]
    assert 0 < in_file < 40
    writer.finish("complete")
    with h5py.File(path, "r", locking=False) as h5:
        assert h5["points/point_id"].shape[0] == 40
    assert_same(read_results(path), range(40))


# -- atomic replacement -----------------------------------------------------------------------
def test_reader_holding_old_file_sees_it_consistent_and_never_blocks_writer(tmp_path):
    path = tmp_path / "live.h5"
    writer = write_run(path, 3)
    with h5py.File(path, "r", locking=False) as old:
        before = old["points/frequency"][:]
        appended = threading.Event()
        failed: list[BaseException] = []

        def append_more() -> None:
            try:
                for i in range(3, 8):
                    writer.append(i, row_for(i))
            except BaseException as exc:  # handed to the test's thread
                failed.append(exc)
            finally:
                appended.set()

        worker = threading.Thread(target=append_more, daemon=True)
        worker.start()
        # a deadline for a writer that would wait for the reader (it never should)
        assert appended.wait(timeout=120.0), "the writer waited for the reader"
        worker.join(timeout=10.0)
        assert not failed, failed
        assert old["points/point_id"].shape == (3,)
        assert np.array_equal(old["points/frequency"][:], before, equal_nan=True)
        assert old.attrs["point_rows"] == 3
        with h5py.File(path, "r", locking=False) as new:
            assert new["points/point_id"].shape == (8,)
    writer.finish("complete")
    assert not [p for p in os.listdir(tmp_path) if p.endswith(".tmp")]


# -- bad input and failures ---------------------------------------------------------------------
def test_existing_output_needs_force(tmp_path):
    path = tmp_path / "taken.h5"
    write_run(path, 2).finish("complete")
    with pytest.raises(store.OutputExists, match=r"taken\.h5") as info:
        RunWriter.create(path, META, COLUMNS)
    assert isinstance(info.value, BadInput)
    assert_same(read_results(path), range(2)), "the refused create changed nothing"
    RunWriter.create(path, {**META, "run_id": "second"}, COLUMNS, force=True).finish("complete")
    assert read_results(path).empty and read_meta(path)["run_id"] == "second"


@pytest.mark.parametrize(
    "content", [b"", b"not an hdf5 file\n" * 40, b"\x89HDF\r\n\x1a\n" + b"x" * 99]
)
def test_non_result_files_give_bad_input(tmp_path, content):
    path = tmp_path / "notes.h5"
    path.write_bytes(content)
    with pytest.raises(store.BadResultFile, match=r"notes\.h5"):
        read_results(path)
    with pytest.raises(BadInput):
        RunWriter.resume(path)


def test_foreign_hdf5_and_missing_file_give_bad_input(tmp_path):
    foreign = tmp_path / "foreign.h5"
    with h5py.File(foreign, "w") as h5:
        h5["x"] = np.arange(3)
    with pytest.raises(store.BadResultFile, match="not a benchseq result"):
        read_meta(foreign)
    with pytest.raises(store.BadResultFile, match="no such result"):
        read_results(tmp_path / "absent.h5")
    with pytest.raises(BadInput, match="not a benchseq journal"):
        journal_path(tmp_path / "j.h5").write_bytes(b"random bytes\n" * 10)
        RunWriter.resume(tmp_path / "j.h5")


def test_unwritable_location_fails_at_create_and_leaves_nothing(tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("I am a file, not a folder")
    with pytest.raises(store.ResultPathError, match="cannot create results"):
        RunWriter.create(blocker / "run.h5", META, COLUMNS)
    assert blocker.read_text() == "I am a file, not a folder"


@pytest.mark.parametrize("code", [errno.ENOSPC, errno.EROFS, errno.EACCES])
def test_full_or_read_only_disk_fails_at_create(tmp_path, monkeypatch, code):
    real_open = os.open

    def refusing_open(path, flags, *args):
        if flags & os.O_CREAT:
            raise OSError(code, os.strerror(code), str(path))
        return real_open(path, flags, *args)

    monkeypatch.setattr(jr.os, "open", refusing_open)
    with pytest.raises(store.ResultPathError, match=os.strerror(code)):
        RunWriter.create(tmp_path / "run.h5", META, COLUMNS)
    monkeypatch.undo()
    assert os.listdir(tmp_path) == []


def test_disk_full_mid_run_raises_and_keeps_every_earlier_point(tmp_path, monkeypatch):
    path = tmp_path / "full.h5"
    writer = write_run(path, 5)
    size_before = journal_path(path).stat().st_size
    real_write = os.write

    def half_then_full(fd, data):
        real_write(fd, bytes(data[: len(data) // 2]))
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(jr.os, "write", half_then_full)
    with pytest.raises(store.StoreWriteError, match="No space left") as info:
        writer.append(5, row_for(5))
    assert "5 points stored before are intact" in str(info.value)
    monkeypatch.undo()
    assert journal_path(path).stat().st_size == size_before, "the torn record was cut off"
    assert_same(read_results(path), range(5))
    assert writer.stored_ids == set(range(5))
    writer.append(5, row_for(5))  # space is back: the run goes on
    writer.finish("complete")
    assert_same(read_results(path), range(6))


def test_rows_that_do_not_fit_the_columns_are_refused(tmp_path):
    writer = RunWriter.create(tmp_path / "rows.h5", META, COLUMNS)
    bad = {**row_for(0), "frequency": "10 Hz"}
    with pytest.raises(store.RowError, match="frequency"):
        writer.append(0, bad)
    with pytest.raises(store.RowError, match="lacks averages"):
        writer.append(0, {k: v for k, v in row_for(0).items() if k != "averages"})
    with pytest.raises(store.RowError, match="unknown columns colour"):
        writer.append(0, {**row_for(0), "colour": "red"})
    with pytest.raises(store.RowError, match="differs"):
        writer.append(1, row_for(0))
    with pytest.raises(store.RowError, match="JSON-able"):
        writer.update_meta(handle=object())
    with pytest.raises(store.RowError, match="finish status"):
        writer.finish("interrupted")
    assert writer.stored_ids == set()
    writer.finish("aborted", traceback="Traceback (most recent call last): ...")
    assert read_meta(tmp_path / "rows.h5")["traceback"].startswith("Traceback")
    with pytest.raises(store.StoreError, match="finished"):
        writer.append(0, row_for(0))
