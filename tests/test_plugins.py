"""Extensions a lab ships in its own package: instrument profiles, driver classes and simulated
devices found through entry points (benchseq.profiles, benchseq.drivers, benchseq.sim_devices).

The lab package is tests/labpkg (invented): its ``fernlab_ext-0.1.dist-info/entry_points.txt``
is what installing a package that declares those entry points leaves on the path, so putting
the folder on sys.path registers them the way ``pip install`` would (entry-point discovery as
specified by the Python Packaging Authority's "Entry points specification").
"""

from __future__ import annotations

import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from benchseq.bench import load_bench
from benchseq.drivers.factory import driver_class
from benchseq.drivers.profile import available_profiles, load_profile
from benchseq.errors import FileKeyError
from benchseq.results import read_results
from benchseq.sim.scenario import load_scenario

LABPKG = Path(__file__).parent / "labpkg"
SCENARIOS = Path(__file__).parents[1] / "sim" / "scenarios"
R_OHM, C_FARAD = 1.0e3, 1.0e-6  # the plug-in device: a 159 Hz RC low-pass


@pytest.fixture
def lab_package(monkeypatch: pytest.MonkeyPatch) -> Path:
    monkeypatch.syspath_prepend(str(LABPKG))
    yield LABPKG
    sys.modules.pop("fernlab_ext", None)


def _bench_text(simulation: str, generator_extra: str = "") -> str:
    text = (SCENARIOS / "demo.bench.toml").read_text(encoding="utf-8")
    text = text.replace('simulation = "demo"', f'simulation = "{simulation}"')
    return text.replace(
        'profile = "scpi-generator"', f'profile = "fern-awg"\n{generator_extra}'
    )


def _scenario_text() -> str:
    """The demo scenario with its regulator replaced by the lab's RC filter device."""
    text = (SCENARIOS / "demo.toml").read_text(encoding="utf-8")
    start = text.index("[device]")
    end = text.index("[injector]")
    device = f'[device]\nmodel = "fern-rc"\nresistance = "{R_OHM:g} ohm"\ncapacitance = "{C_FARAD:g} F"\n\n'
    return text[:start] + device + text[end:]


def test_registered_profile_is_found_by_name_and_listed(lab_package: Path) -> None:
    profile = load_profile("fern-awg", "generator")
    assert profile.name == "fern-awg"
    assert "registered by a package" in profile.source
    assert "fern-awg" in available_profiles()
    assert available_profiles()[:4] == sorted(available_profiles()[:4])  # shipped ones first


def test_unknown_profile_lists_registered_ones(lab_package: Path) -> None:
    with pytest.raises(FileKeyError, match="fern-awg"):
        load_profile("fern-awx", "generator")


def test_registered_driver_class_by_bare_name(lab_package: Path, tmp_path: Path) -> None:
    bench_file = tmp_path / "bench.toml"
    bench_file.write_text(_bench_text("demo", 'driver_class = "fern-awg-driver"'))
    bench = load_bench(str(bench_file))
    cls = driver_class(bench.instruments["generator"], bench.source)
    assert cls.__name__ == "CountingGenerator"


@pytest.mark.parametrize(
    ("name", "fragment"),
    [
        ("fern-not-a-driver", "must be a subclass of benchseq.drivers.Generator"),
        ("fern-broken", "ModuleNotFoundError"),
    ],
)
def test_bad_registered_driver_names_file_and_key(
    lab_package: Path, tmp_path: Path, name: str, fragment: str
) -> None:
    bench_file = tmp_path / "bench.toml"
    bench_file.write_text(_bench_text("demo", f'driver_class = "{name}"'))
    bench = load_bench(str(bench_file))
    with pytest.raises(FileKeyError) as caught:
        driver_class(bench.instruments["generator"], bench.source)
    assert caught.value.key == "generator.driver_class"
    assert fragment in str(caught.value) and "bench.toml" in str(caught.value)


def test_unregistered_bare_driver_name_is_refused_when_the_bench_is_read(
    lab_package: Path, tmp_path: Path
) -> None:
    bench_file = tmp_path / "bench.toml"
    bench_file.write_text(_bench_text("demo", 'driver_class = "fern-awg-drver"'))
    with pytest.raises(FileKeyError) as caught:
        load_bench(str(bench_file))
    assert caught.value.key == "generator.driver_class"
    assert "fern-awg-driver" in str(caught.value)  # the registered names are listed


def test_registered_device_model_in_a_scenario(lab_package: Path, tmp_path: Path) -> None:
    (tmp_path / "rc.toml").write_text(_scenario_text())
    scenario = load_scenario(str(tmp_path / "rc.toml"))
    assert type(scenario.device).__name__ == "RcFilter"
    assert scenario.device.kind == "rc-filter"


def test_unknown_device_model_lists_built_in_and_registered(
    lab_package: Path, tmp_path: Path
) -> None:
    (tmp_path / "rc.toml").write_text(_scenario_text().replace('"fern-rc"', '"fern-rx"'))
    with pytest.raises(FileKeyError) as caught:
        load_scenario(str(tmp_path / "rc.toml"))
    assert caught.value.key == "device.model"
    assert "fern-rc" in str(caught.value) and "regulator" in str(caught.value)


PLAN = """
title = "Lab package check: RC filter rail"
[device]
name = "RC filter rail (lab package device)"
absolute_max = "6 V"
min_operating = "1 V"
[sweep]
dc = ["4.5 V"]
ripple = ["100 mVpp"]
frequency = ["50 Hz", "500 Hz", "5 kHz"]
[settle]
after_operating_point = "0.2 s"
[capture]
min_cycles = 10
max_time = "4 s"
target_uncertainty = "0.05 dB"
"""


def test_run_through_the_command_line_with_all_three_registered(tmp_path: Path) -> None:
    """`benchseq run` in a fresh process with the lab package on the path: the bench file
    names the registered profile and driver, its scenario the registered device. The measured
    rejection follows the first-order low-pass 20·log10 √(1 + (2πfRC)²) (Horowitz & Hill,
    The Art of Electronics, 3rd ed., §1.7.1, from memory) within 4u at every point."""
    (tmp_path / "rc.toml").write_text(_scenario_text())
    (tmp_path / "bench.toml").write_text(
        _bench_text("rc.toml", 'driver_class = "fern-awg-driver"')
    )
    (tmp_path / "plan.toml").write_text(PLAN)
    out = tmp_path / "rc.h5"
    log = tmp_path / "frequencies.txt"
    path = os.pathsep.join([str(LABPKG), os.environ.get("PYTHONPATH", "")])
    env = {**os.environ, "PYTHONPATH": path, "FERNLAB_LOG": str(log)}
    done = subprocess.run(
        [sys.executable, "-m", "benchseq", "run", str(tmp_path / "plan.toml"),
         "--bench", str(tmp_path / "bench.toml"), "--out", str(out), "--json"],
        capture_output=True, text=True, timeout=300, env=env, check=False,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr[-3000:]
    rows = read_results(out)
    assert len(rows) == 3
    told = {round(float(x)) for x in log.read_text().split()}  # the registered driver was used
    assert {50, 500, 5000} <= told, told
    f = rows["frequency"].to_numpy(dtype=float)
    value = rows["rejection_db"].to_numpy(dtype=float)
    u = rows["uncertainty_db"].to_numpy(dtype=float)
    expected = 10.0 * np.log10(1.0 + (2.0 * math.pi * f * R_OHM * C_FARAD) ** 2)
    assert not rows["is_bound"].to_numpy(dtype=bool).any()
    assert np.all(np.abs(value - expected) <= 4.0 * u + 1e-9), (value, expected, u)
