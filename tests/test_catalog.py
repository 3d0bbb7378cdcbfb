"""`benchseq catalog` through the command line: a few hundred result files written through
the store (plus two short simulated runs) gathered into the Parquet dataset, its row counts
and `worst` summary checked against pandas over ``read_results`` (an independent engine),
incremental rebuilds, damaged files and bad input.

The reference computation is pandas' groupby/min over the frames ``read_results`` returns,
never the catalog's own SQL. The "night" of a run is the date its evening began: the files
here are written with start times chosen on a known night, so the expected night is known
without the catalog's rule."""

from __future__ import annotations

import contextlib
import datetime as dt
import io
import json
import math
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from report_files import row, write_result

from benchseq.cli import main
from benchseq.results import ResultWarning
from benchseq.store import RunWriter, read_meta, read_results

DEVICES = (
    "FV-33 regulator evaluation board",
    "FV-12 low-noise regulator board",
    "FV-50 buck post-filter board",
)
LABS = ("Fernhollow validation lab, bay 2", "Fernhollow validation lab, bay 5")
NIGHTS = tuple(dt.date(2026, 3, 2) + dt.timedelta(days=k) for k in range(4))
FREQS = (100.0, 1.2e3, 1.0e4, 1.1e5)  # the nearest to 1 kHz in log distance is 1.2 kHz
DC = (4.5, 5.0)
LOADS = (0.05, 0.1)
FILES = 204
INTERRUPTED = {17, 61, 140}
PARTIAL = {33, 99}  # stopped before the end of the plan

SIM_PLAN = """
title = "FV-33 two-point look"
[device]
name = "FV-33 regulator evaluation board"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = { at = ["1 kHz", "10 kHz"] }
[capture]
max_time = "1 s"
target_uncertainty = "0.3 dB"
"""


def _started(k: int) -> tuple[str, dt.date]:
    """A start time on night ``k % 4``: evenings from 20:00, some after midnight."""
    night = NIGHTS[k % len(NIGHTS)]
    hour = (20 + k % 9) % 24  # 20:00 .. 04:00
    day = night + dt.timedelta(days=1 if hour < 12 else 0)
    when = dt.datetime(day.year, day.month, day.day, hour, k % 60, tzinfo=dt.UTC)
    return when.isoformat(), night


def _rows(k: int, rng: np.random.Generator, count: int | None = None) -> list[dict]:
    rows = []
    pid = 0
    for dc in DC:
        for load in LOADS:
            for f in FREQS:
                value = 70.0 - 10.0 * math.log10(f / 100.0) + rng.normal(0.0, 3.0)
                extra: dict = {"dc_level": dc, "pin_dc": dc, "load_current": load}
                if rng.random() < 0.08:
                    extra["bound_db"] = value + 5.0
                elif rng.random() < 0.1:
                    extra["flags"] = "target_unmet"
                rows.append(row(pid, f, float(value), **extra))
                pid += 1
    return rows if count is None else rows[:count]


def write_campaign(folder: Path, count: int = FILES, seed: int = 0) -> dict[Path, dt.date]:
    """``count`` result files in nested night folders; returns each file's night."""
    rng = np.random.default_rng(seed)
    nights = {}
    for k in range(count):
        started, night = _started(k)
        rows = _rows(k, rng)
        status: str | None = "complete"
        planned = len(rows)
        if k in INTERRUPTED:
            rows, status = rows[:5], None
        elif k in PARTIAL:
            rows, status = rows[:9], "stopped"
        path = folder / f"night-{night}" / f"run-{k:04d}.h5"
        path.parent.mkdir(parents=True, exist_ok=True)
        meta = {
            "device": DEVICES[k % len(DEVICES)],
            "bench_name": LABS[(k // 12) % len(LABS)],
            "bench_source": f"benches/bay{2 + 3 * ((k // 12) % 2)}.toml",
            "bench_sha256": f"{(k // 12) % 2:064x}",
            "started": started,
        }
        write_result(path, rows, status=status, point_count=planned, meta=meta)
        nights[path] = night
    return nights


@pytest.fixture(scope="module")
def campaign(tmp_path_factory: pytest.TempPathFactory) -> dict[str, object]:
    root = tmp_path_factory.mktemp("campaign")
    results = root / "results"
    nights = write_campaign(results)
    plan = root / "two.toml"
    plan.write_text(SIM_PLAN, encoding="utf-8")
    for seed in (1, 2):  # two real (simulated) runs among the written ones
        out = results / "sim" / f"sim-{seed}.h5"
        out.parent.mkdir(exist_ok=True)
        assert main(["run", str(plan), "--out", str(out), "--seed", str(seed), "-q"]) == 0
    cat = root / "cat"
    argv = ["catalog", "build", str(results), "--into", str(cat), "--json"]
    with contextlib.redirect_stdout(io.StringIO()) as out:
        assert main(argv) == 0
    return {
        "results": results,
        "nights": nights,
        "cat": cat,
        "report": json.loads(out.getvalue()),
        "frames": _frames(results),
    }


def _json(capsys: pytest.CaptureFixture[str], argv: list[str], code: int = 0) -> dict:
    capsys.readouterr()
    assert main(argv) == code
    return json.loads(capsys.readouterr().out)


def _frames(results: Path) -> pd.DataFrame:
    """Every result file under ``results`` read by read_results/read_meta, concatenated."""
    parts = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResultWarning)
        for path in sorted(results.rglob("*.h5")):
            try:
                frame = read_results(path)
                meta = read_meta(path)
            except Exception:
                continue
            frame = frame.assign(
                source=str(path.resolve()),
                device=meta["device"],
                lab=meta["bench_name"],
                started=meta["started"],
                status=meta["status"],
            )
            parts.append(frame)
    return pd.concat(parts, ignore_index=True)


@pytest.mark.slow
def test_build_counts_every_point_and_marks_unfinished_runs(
    campaign: dict, capsys: pytest.CaptureFixture[str]
) -> None:
    cat: Path = campaign["cat"]  # type: ignore[assignment]
    report: dict = campaign["report"]  # type: ignore[assignment]
    expected: pd.DataFrame = campaign["frames"]  # type: ignore[assignment]
    assert len(report["added"]) == FILES + 2 and report["skipped"] == []
    assert report["catalogued_rows"] == len(expected)
    count = _json(capsys, ["catalog", "query", str(cat), "--sql",
                           "SELECT count(*) AS n FROM points", "--json"])  # fmt: skip
    assert count["rows"] == [{"n": len(expected)}]
    runs = _json(capsys, ["catalog", "query", str(cat), "runs", "--json"])["rows"]
    assert len(runs) == FILES + 2
    by_file = {Path(r["source"]).name: r for r in runs}
    for k in INTERRUPTED:
        assert by_file[f"run-{k:04d}.h5"]["status"] == "interrupted"
        assert by_file[f"run-{k:04d}.h5"]["partial"] is True
    for k in PARTIAL:
        assert by_file[f"run-{k:04d}.h5"]["status"] == "stopped"
        assert by_file[f"run-{k:04d}.h5"]["partial"] is True
    assert by_file["run-0000.h5"]["status"] == "complete"
    assert by_file["run-0000.h5"]["partial"] is False
    assert by_file["sim-1.h5"]["points"] == 2 and by_file["sim-1.h5"]["status"] == "complete"
    # the night each file was written for (its folder), not recomputed by the catalog's rule
    nights: dict[Path, dt.date] = campaign["nights"]  # type: ignore[assignment]
    for path, night in nights.items():
        assert by_file[path.name]["night"] == night.isoformat()
    # Hive-style partition folders (common practice: key=value directory names)
    folders = {p.parent.relative_to(cat).as_posix() for p in cat.rglob("*.parquet")}
    assert "points/device_key=fv-33-regulator-evaluation-board/night=2026-03-02" in folders


@pytest.mark.slow
def test_worst_matches_pandas_groupby(
    campaign: dict, capsys: pytest.CaptureFixture[str]
) -> None:
    nights: dict[Path, dt.date] = campaign["nights"]  # type: ignore[assignment]
    cat: Path = campaign["cat"]  # type: ignore[assignment]
    got = _json(capsys, ["catalog", "query", str(cat), "worst", "--frequency", "1 kHz",
                         "--dc", "5 V", "--load", "100 mA", "--json"])["rows"]  # fmt: skip
    # reference: pandas over read_results, each run's planned frequency nearest 1 kHz
    frame: pd.DataFrame = campaign["frames"]  # type: ignore[assignment]
    frame = frame[(frame["dc_level"] == 5.0) & np.isclose(frame["load_current"], 0.1)].copy()
    frame["distance"] = np.abs(np.log(frame["frequency_planned"] / 1000.0))
    nearest = frame.groupby("source")["distance"].transform("min")
    frame = frame[frame["distance"] == nearest]
    bounds = frame[frame["is_bound"]]
    frame = frame[~frame["is_bound"] & frame["rejection_db"].notna()].copy()
    night_of = {str(p.resolve()): n.isoformat() for p, n in nights.items()}
    frame = frame[frame["source"].isin(night_of)]  # the simulated runs have no load axis
    frame["night"] = frame["source"].map(night_of)
    expected = frame.groupby(["device", "lab", "night"])["rejection_db"].min()
    assert len(got) == len(expected) == len(DEVICES) * len(LABS) * len(NIGHTS)
    for r in got:
        assert r["worst_db"] == pytest.approx(expected[(r["device"], r["lab"], r["night"])],
                                              abs=1e-9)  # fmt: skip
        assert r["frequency_planned"] == 1.2e3  # the plan's frequency nearest 1 kHz
    lowest = bounds.assign(night=bounds["source"].map(night_of)).groupby(
        ["device", "lab", "night"])["bound_db"].min()  # fmt: skip
    assert len(lowest) > 0
    for r in got:
        key = (r["device"], r["lab"], r["night"])
        assert (r["lowest_bound_db"] is None) == (key not in lowest)
        if key in lowest:
            assert r["lowest_bound_db"] == pytest.approx(lowest[key], abs=1e-9)
    # a band instead of a frequency: every planned frequency inside it counts
    band = _json(capsys, ["catalog", "query", str(cat), "worst", "--band", "50 Hz", "200 kHz",
                          "--device", "FV-12", "--json"])["rows"]  # fmt: skip
    every: pd.DataFrame = campaign["frames"]  # type: ignore[assignment]
    every = every[~every["is_bound"] & every["rejection_db"].notna()]
    every = every[every["device"].str.contains("FV-12")]
    assert min(r["worst_db"] for r in band) == pytest.approx(every["rejection_db"].min(), abs=1e-9)


def test_incremental_build_skips_unchanged_and_takes_new_and_resumed(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    results = tmp_path / "results"
    write_campaign(results, count=12, seed=3)
    resumed = results / "cut" / "run-cut.h5"
    resumed.parent.mkdir()
    write_result(resumed, _rows(0, np.random.default_rng(8), 3), status=None, point_count=16)
    cat = tmp_path / "cat"
    first = _json(capsys, ["catalog", "build", str(results), "--into", str(cat), "--json"])
    assert len(first["added"]) == 13 and first["incomplete_runs"] == 1
    again = _json(capsys, ["catalog", "build", str(results), "--into", str(cat), "--json"])
    assert again["unchanged"] == 13 and again["added"] == [] and again["rows_written"] == 0
    # one new file, and one interrupted run resumed and finished
    new = results / "late" / "run-new.h5"
    new.parent.mkdir()
    write_result(new, _rows(0, np.random.default_rng(9), 4), meta={"started": _started(1)[0]})
    before = len(read_results(resumed))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResultWarning)
        writer = RunWriter.resume(resumed)
        writer.append(before, row(before, 5e4, 41.0))
        writer.finish("complete", reason="resumed")
    third = _json(capsys, ["catalog", "build", str(results), "--into", str(cat), "--json"])
    assert third["unchanged"] == 12
    assert third["added"] == [str(new.resolve())]
    assert third["replaced"] == [str(resumed.resolve())]
    rows = _json(capsys, ["catalog", "query", str(cat), "--json", "--sql",
                          "SELECT count(*) AS n, any_value(status) AS status FROM points "
                          f"WHERE source = '{resumed.resolve()}'"])["rows"]  # fmt: skip
    assert rows == [{"n": before + 1, "status": "complete"}]
    total = _json(capsys, ["catalog", "query", str(cat), "--json", "--sql",
                           "SELECT count(*) AS n FROM points"])["rows"][0]["n"]  # fmt: skip
    assert total == len(_frames(results))
    # the replaced run's old Parquet file is gone: one file per catalogued run
    assert len(list((cat / "points").rglob("*.parquet"))) == 14


def test_damaged_file_is_named_and_skipped(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    results = tmp_path / "results"
    write_campaign(results, count=4, seed=4)
    bad = results / "night-2026-03-02" / "cut.h5"
    good = next(results.rglob("run-0000.h5"))
    bad.write_bytes(good.read_bytes()[:700])  # a copy cut short
    (results / "notes.h5").write_bytes(b"not a result file\n")
    cat = tmp_path / "cat"
    capsys.readouterr()
    assert main(["catalog", "build", str(results), "--into", str(cat)]) == 0
    captured = capsys.readouterr()
    assert str(bad.resolve()) in captured.err and "notes.h5" in captured.err
    assert "Traceback" not in captured.err
    assert "4 added" in " ".join(captured.out.split())
    report = _json(capsys, ["catalog", "build", str(results), "--into", str(cat), "--json"])
    assert {s["file"] for s in report["skipped"]} == {str(bad.resolve()),
                                                      str((results / "notes.h5").resolve())}


def test_build_cut_short_leaves_no_visible_rows(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    results = tmp_path / "results"
    write_campaign(results, count=3, seed=5)
    cat = tmp_path / "cat"
    assert main(["catalog", "build", str(results), "--into", str(cat), "-q"]) == 0
    # what a build killed between writing and the manifest leaves: a stray file and a temp
    one = next((cat / "points").rglob("*.parquet"))
    (one.parent / "0123456789abcdef.parquet").write_bytes(one.read_bytes())
    (one.parent / ".x.parquet.0.tmp").write_bytes(b"half")
    count = _json(capsys, ["catalog", "query", str(cat), "--json", "--sql",
                           "SELECT count(DISTINCT source) AS n FROM points"])  # fmt: skip
    assert count["rows"] == [{"n": 3}]
    assert main(["catalog", "build", str(results), "--into", str(cat), "-q"]) == 0
    assert [p.name for p in one.parent.iterdir() if p.name.startswith(("0123", ".x"))] == []


def test_bad_input_exits_2_without_traceback(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    results = tmp_path / "results"
    write_campaign(results, count=2, seed=6)
    cat = tmp_path / "cat"
    assert main(["catalog", "build", str(results), "--into", str(cat), "-q"]) == 0
    capsys.readouterr()
    assert main(["catalog", "query", str(cat), "--sql", "SELEC count(*) FROM points"]) == 2
    err = capsys.readouterr().err
    assert "syntax error" in err and "Traceback" not in err
    assert main(["catalog", "query", str(cat), "--sql", "SELECT nope FROM points"]) == 2
    assert "nope" in capsys.readouterr().err
    assert main(["catalog", "build", str(tmp_path / "absent"), "--into", str(cat)]) == 2
    assert "absent" in capsys.readouterr().err
    assert main(["catalog", "query", str(tmp_path / "absent")]) == 2
    assert main(["catalog", "query", str(cat), "worst"]) == 2  # no frequency or band
    assert "--frequency" in capsys.readouterr().err
    assert main(["catalog", "query", str(cat), "worst", "--frequency", "1 kV"]) == 2
    data = _json(capsys, ["catalog", "query", str(cat), "--sql", "SELEC", "--json"], code=2)
    assert data["exit_code"] == 2 and "syntax error" in data["error"]


def _python(code: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=False
    )


def test_duckdb_is_optional(tmp_path: Path) -> None:
    done = _python("import sys, benchseq, benchseq.cli; print('duckdb' in sys.modules)")
    assert done.stdout.strip() == "False", done.stderr
    done = _python(
        "import sys; sys.modules['duckdb'] = None\n"
        "from benchseq.cli import main\n"
        f"sys.exit(main(['catalog', 'build', {str(tmp_path)!r}, '--into', "
        f"{str(tmp_path / 'cat')!r}]))"
    )
    assert done.returncode == 2, done.stderr
    assert "benchseq[catalog]" in done.stderr and "Traceback" not in done.stderr
