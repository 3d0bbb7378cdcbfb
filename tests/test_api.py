"""The Python interface: the README's notebook example, run as written on the embedded bench."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pandas as pd
import pytest
import xarray as xr

import benchseq
from benchseq.errors import BadInput

PLANS = Path(__file__).resolve().parents[1] / "plans"

SHORT = """\
title = "API check"
[device]
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = ["1 kHz", "10 kHz"]
"""


def test_import_is_light_and_names_load_on_use() -> None:
    assert benchseq.__version__
    assert callable(benchseq.run) and callable(benchseq.read_results)
    with pytest.raises(AttributeError):
        benchseq.no_such_name  # noqa: B018


def test_check_run_and_read_from_python(tmp_path: Path) -> None:
    plan_file = tmp_path / "short.toml"
    plan_file.write_text(SHORT, encoding="utf-8")
    plan = benchseq.load_plan(plan_file)
    report = benchseq.check_plan(plan)
    assert report.point_count == 2 and report.refused_count == 0
    events: list[str] = []
    result = benchseq.run(plan, out=tmp_path / "r.h5", on_event=lambda e: events.append(e.kind))
    assert result.status == "complete" and result.path.exists()
    assert "point_stored" in events
    points = benchseq.read_results(result.path)
    assert sorted(points["frequency"]) == pytest.approx([1e3, 1e4], rel=1e-3)
    assert benchseq.read_meta(result.path)["status"] == "complete"
    with h5py.File(result.path, "r") as f:  # plain h5py reads it too
        assert "points" in f
    # a stored run is never overwritten without force, from Python as from the command line
    with pytest.raises(BadInput):
        benchseq.run(plan, out=result.path)


def test_python_interface_does_not_print(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    plan_file = tmp_path / "short.toml"
    plan_file.write_text(SHORT, encoding="utf-8")
    benchseq.run(plan_file, out=tmp_path / "quiet.h5")
    captured = capsys.readouterr()
    assert captured.out == "" and captured.err == ""


# -- the xarray export (xarray is a test dependency; optional for users) -------------------
TWO_LEVELS = SHORT.replace('dc = ["5 V"]', 'dc = ["4.5 V", "5 V"]')


@pytest.fixture(scope="module")
def two_levels(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("xr")
    plan_file = folder / "two.toml"
    plan_file.write_text(TWO_LEVELS, encoding="utf-8")
    return benchseq.run(plan_file, out=folder / "two.h5").path


def test_xarray_dataset_holds_the_table_with_units_and_metadata(two_levels: Path) -> None:
    frame = benchseq.read_results(two_levels)
    ds = benchseq.read_results(two_levels, as_xarray=True)
    assert isinstance(ds, xr.Dataset) and ds.sizes == {"point_id": 4}
    assert list(ds.indexes["point_id"]) == list(frame["point_id"])
    assert set(ds.coords) == {"point_id", "frequency_planned", "frequency", "dc_level",
                              "load_current"}  # fmt: skip
    assert set(ds.variables) == set(frame.columns)
    for name in frame.columns:
        np.testing.assert_array_equal(ds[name].to_numpy(), frame[name].to_numpy(), err_msg=name)
    # units as the file states them, read with plain h5py; symbols of the SI brochure
    # (BIPM, 9th ed., tables 2 and 4) and dB (common practice)
    with h5py.File(two_levels, "r", locking=False) as h5:
        for name in frame.columns:
            assert ds[name].attrs["units"] == h5[f"points/{name}"].attrs["units"], name
    expected = {"frequency": "Hz", "dc_level": "V", "load_current": "A", "bench_time": "s",
                "rejection_db": "dB"}  # fmt: skip
    assert {name: ds[name].attrs["units"] for name in expected} == expected
    assert ds["dc_level"].attrs["long_name"]
    # xarray's own selection and conversion back to pandas see the same points
    assert ds.where(ds.dc_level == 4.5, drop=True).sizes["point_id"] == 2
    back = ds.to_dataframe().reset_index()[list(frame.columns)]
    pd.testing.assert_frame_equal(back, frame, check_dtype=False, check_index_type=False)
    # the run's metadata: scalars as they are, nested items as JSON text
    meta = benchseq.read_meta(two_levels)
    assert ds.attrs["run_id"] == meta["run_id"] and ds.attrs["status"] == "complete"
    assert json.loads(ds.attrs["sessions"]) == meta["sessions"]


def test_xarray_dataset_survives_a_netcdf3_round_trip(two_levels: Path, tmp_path: Path) -> None:
    """The attrs are netCDF-safe: xarray's netCDF-3 writer (its scipy backend, scipy being a
    test dependency) takes the Dataset, less the complex variables netCDF-3 has no type for
    (NetCDF User Guide, "classic" data types), and reads back the same Dataset."""
    ds = benchseq.to_xarray(two_levels)
    real = ds.drop_vars([n for n in ds.variables if np.iscomplexobj(ds[n])])
    assert {"pin", "output", "ratio"} <= set(ds.variables) - set(real.variables)
    real.to_netcdf(tmp_path / "two.nc", engine="scipy")
    with xr.open_dataset(tmp_path / "two.nc", engine="scipy") as back:
        xr.testing.assert_identical(back.load(), real)


def test_xarray_missing_is_a_clear_error(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    monkeypatch.setitem(sys.modules, "xarray", None)  # as if not installed
    with pytest.raises(ModuleNotFoundError, match=r"pip install 'benchseq\[xarray\]'"):
        benchseq.read_results(tmp_path / "any.h5", as_xarray=True)
    with pytest.raises(ModuleNotFoundError, match="optional dependency"):
        benchseq.to_xarray(tmp_path / "any.h5")


def test_importing_benchseq_does_not_import_xarray(tmp_path: Path) -> None:
    script = "import sys, benchseq, benchseq.api, benchseq.results; print('xarray' in sys.modules)"
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, timeout=60,
        cwd=tmp_path, check=False,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "False"
