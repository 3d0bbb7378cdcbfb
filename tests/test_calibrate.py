"""Channel-match calibration on the simulated bench, its CAL.h5 file, and runs applying it.

The outside reference is the simulator's configured truth (sim/scenarios/demo.toml, read
through benchseq.sim.scenario): the scope channels' gain and phase errors and the probes'
true attenuations, and per point the true pin and output phasors the simulator solved by
nodal analysis (benchseq.store.read_truth). The simulator never imports the analysis."""

from __future__ import annotations

import json
import math
import os
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
from fakebench import Keeper

from benchseq import calibrate as cal
from benchseq.bench import embedded_bench_text, load_bench
from benchseq.errors import BadInput, FileKeyError, MeasurementFailure
from benchseq.records import FLAG_TEXT
from benchseq.runner import resume_run, start_run
from benchseq.sim.scenario import load_scenario
from benchseq.stopping import StopControl
from benchseq.store import read_meta, read_results, read_truth

PLANS = Path(__file__).resolve().parent.parent / "plans"
DB = 20.0 / math.log(10.0)  # dB per neper


def bench_text(calibration: str | None = None, **replace: str) -> str:
    """The embedded demo bench, naming ``calibration`` and with text replacements."""
    text = embedded_bench_text("demo")
    for old, new in replace.items():
        old = old.replace("__", " ")
        assert old in text, old
        text = text.replace(old, new)
    if calibration is not None:
        assert text.count("\n[scope]\n") == 1
        text = text.replace("\n[scope]\n", f'\n[scope]\ncalibration = "{calibration}"\n')
    return text


def true_mismatch(frequency: np.ndarray) -> np.ndarray:
    """H_true = output channel / pin channel with both probes on one node, from the
    scenario's ScopeTruth: (1 + gain error)·e^{j(phase error − 2πf·skew)} per channel, and
    each probe's nominal/true attenuation (the scope scales by the bench file's figure).
    The AC corner, analog bandwidth and bandwidth limit are common to both and cancel."""
    truth = load_scenario("demo").scope
    bench = load_bench(None)

    def channel(ch: int, nominal: float) -> np.ndarray:
        gain = 1.0 + truth.gain_error.get(ch, 0.0)
        phase = math.radians(truth.phase_error_deg.get(ch, 0.0))
        skew = truth.skew.get(ch, 0.0)
        probe = nominal / truth.probe_attenuation.get(ch, nominal)
        return gain * probe * np.exp(1j * (phase - 2 * math.pi * frequency * skew))

    pin, out = bench.scope.pin, bench.scope.output
    return channel(out.channel, out.probe) / channel(pin.channel, pin.probe)


@pytest.fixture(scope="module")
def lab(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """A calibration of the simulated demo bench (seed 11), then plans/demo.toml run with and
    without it (seed 3, so the calibration's noise is independent of the runs')."""
    folder = tmp_path_factory.mktemp("lab")
    (folder / "bench.toml").write_text(bench_text("cal.h5"), encoding="utf-8")
    keeper = Keeper()
    result = cal.run_calibration(None, folder / "bench.toml", None, seed=11, session_factory=keeper)
    raw, _ = start_run(str(PLANS / "demo.toml"), None, str(folder / "raw.h5"), seed=3)
    done, _ = start_run(
        str(PLANS / "demo.toml"), str(folder / "bench.toml"), str(folder / "cal.run.h5"), seed=3
    )
    assert raw.status == done.status == "complete"
    return {
        "folder": folder,
        "result": result,
        "keeper": keeper,
        "raw": folder / "raw.h5",
        "calibrated": folder / "cal.run.h5",
    }


# -- (1) the calibration measures the simulator's configured mismatch ------------------------
@pytest.mark.slow
def test_calibration_measures_the_scenarios_mismatch(lab: dict[str, Any]) -> None:
    """Every point's H_cal equals the ScopeTruth mismatch (+0.3 % and +0.5° on channel 2, the
    pin probe 10.02:1 where the bench says 10:1) within 3 standard uncertainties, in gain and
    in phase; the mismatch itself is many uncertainties away from 1, so a calibration that
    measured nothing would fail."""
    loaded = lab["result"].loaded
    c = loaded.columns
    truth = true_mismatch(c["frequency"])
    error = np.log(c["ratio"] / truth)
    u_gain, u_phase = c["uncertainty"], np.radians(c["phase_uncertainty_deg"])
    assert np.all(np.abs(error.real) <= 3 * u_gain), DB * error.real
    assert np.all(np.abs(error.imag) <= 3 * u_phase), np.degrees(error.imag)
    assert np.all(np.abs(np.log(np.abs(truth))) > 6 * u_gain)
    # 0.5° is 25 uncertainties at the sweep's 0.003 dB target (3.5e-4, in rad likewise)
    assert np.all(np.abs(np.angle(truth)) > 20 * u_phase)
    # the demo's figures, for the record: +0.0434 dB and +0.5° (1.003·1.002, 0.5°)
    assert DB * math.log(abs(truth[0])) == pytest.approx(0.04337, abs=1e-5)


@pytest.mark.slow
def test_calibration_covers_the_plan_with_guard_points(lab: dict[str, Any]) -> None:
    """The sweep goes one guard step beyond each end of the plan (a run's frequency may move
    by the plan's tolerance, its refined frequency a little more), records the ranges it used,
    and the probe went back to the output."""
    result = lab["result"]
    low, high = result.loaded.span
    assert low < 10.0 / 1.05 and high > 1e6 * 1.05
    assert result.loaded.columns["frequency"].size == 16 + len(result.guards)
    conditions = result.loaded.conditions
    assert conditions["both_probes_on"] == "pin" and conditions["pin_ranges_v"]
    assert conditions["scope_identity"].startswith("benchseq,SIM-SCOPE")
    simulator = lab["keeper"].sessions[0].simulator
    assert simulator.probe_nodes[load_bench(None).scope.output.channel] == "output"
    assert any("range-dependent gain" in note for note in result.notes)


# -- (2) ACCEPTANCE: a run with the calibration applied ------------------------------------------
def _mismatch_error(path: Path) -> tuple[float, float, float, int]:
    """Weighted mean (weights 1/u²) over the points detected with u ≤ 0.05 dB of
    ln(measured ratio / true ratio), the true ratio being the simulator's output/pin phasors:
    (gain error dB, phase error °, standard error dB, points used). u is the noise part of
    the stated uncertainty: without a calibration the stated one also holds the channels'
    tolerance term, the very error measured here."""
    frame = read_results(path).merge(read_truth(path), on="point_id", suffixes=("", "_true"))
    noise_u = np.sqrt(
        np.maximum(frame["uncertainty_db"] ** 2 - (DB * frame["match_uncertainty"]) ** 2, 0.0)
    )
    frame = frame.assign(noise_u=noise_u)
    used = frame[~frame["is_bound"] & (frame["noise_u"] <= 0.05) & (frame["noise_u"] > 0)]
    true_ratio = (used["output_true"] / used["pin_true"]).to_numpy()
    error = np.log(used["ratio"].to_numpy() / true_ratio)
    weight = 1.0 / used["noise_u"].to_numpy() ** 2
    mean = np.sum(weight * error) / np.sum(weight)
    return DB * mean.real, math.degrees(mean.imag), 1.0 / math.sqrt(np.sum(weight)), len(used)


@pytest.mark.slow
def test_acceptance_calibration_removes_the_channel_mismatch(lab: dict[str, Any]) -> None:
    """plans/demo.toml with the calibration applied: the systematic ratio error against the
    simulator's truth is under 0.02 dB and 0.2°; without it, the scenario's mismatch shows."""
    raw_db, raw_deg, raw_se, raw_n = _mismatch_error(lab["raw"])
    cal_db, cal_deg, cal_se, cal_n = _mismatch_error(lab["calibrated"])
    assert raw_n >= 5 and cal_n >= 5
    assert raw_se < 0.01 and cal_se < 0.01  # the comparison can resolve 0.02 dB
    assert raw_db > 0.03 and raw_deg > 0.3, (raw_db, raw_deg)
    assert abs(cal_db) < 0.02 and abs(cal_deg) < 0.2, (cal_db, cal_deg)


@pytest.mark.slow
def test_calibrated_run_records_what_it_applied(lab: dict[str, Any]) -> None:
    meta = read_meta(lab["calibrated"])
    applied = meta["calibration"]
    loaded = lab["result"].loaded
    assert applied["sha256"] == loaded.sha256 and applied["id"] == loaded.id
    assert applied["path"] == str((lab["folder"] / "cal.h5").resolve())
    assert applied["mismatches"] == [] and applied["uncovered_frequencies_hz"] == []
    assert applied["span"] == pytest.approx(list(loaded.span))
    assert applied["conditions"]["output"]["probe"] == 1.0
    frame = read_results(lab["calibrated"])
    flags = " ".join(frame["flags"])
    assert "outside_calibration" not in flags and cal.CONDITIONS_FLAG not in flags
    assert read_meta(lab["raw"])["calibration"] is None


# -- (3) CAL.h5: round trip, atomic write, no overwrite without force ----------------------------
@pytest.mark.slow
def test_file_round_trip_and_self_description(lab: dict[str, Any]) -> None:
    loaded = lab["result"].loaded
    again = cal.load_calibration(loaded.path)
    for name, values in loaded.columns.items():
        if name == "flags":
            assert list(again.columns[name]) == list(values)
        else:
            np.testing.assert_array_equal(again.columns[name], values)
    assert again.conditions == loaded.conditions and again.meta == loaded.meta
    probe = 2e3
    assert again.table.lookup(probe).ratio == loaded.table.lookup(probe).ratio
    summary = json.loads(json.dumps(cal.calibration_summary(lab["result"])))
    assert len(summary["points"]) == loaded.columns["frequency"].size
    assert summary["points"][0]["gain_db"] == pytest.approx(loaded.columns["gain_db"][0])
    with h5py.File(loaded.path, "r") as h5:  # plain h5py, no benchseq needed
        assert h5.attrs["format"] == cal.FORMAT and h5.attrs["schema_version"] == 1
        assert h5["table/frequency"].attrs["units"] == "Hz"
        assert h5["table/ratio"].dtype == np.complex128
        assert h5["conditions"].attrs["output_probe"] == 1.0
        assert "calibration" in h5["meta/bench_text"][()].decode()


@pytest.mark.slow
def test_no_overwrite_without_force_and_atomic_replace(
    lab: dict[str, Any], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    loaded = lab["result"].loaded
    path = tmp_path / "cal.h5"
    cal.write_calibration(path, loaded.meta, loaded.columns)
    before = path.read_bytes()
    with pytest.raises(BadInput, match="exists"):
        cal.write_calibration(path, loaded.meta, loaded.columns)
    assert path.read_bytes() == before

    def broken(h5: Any, meta: Any, table: Any) -> None:  # dies half-way through writing
        h5.attrs["format"] = cal.FORMAT
        raise OSError("disk full")

    monkeypatch.setattr(cal, "_write_layout", broken)
    with pytest.raises(OSError, match="disk full"):
        cal.write_calibration(path, loaded.meta, loaded.columns, force=True)
    assert path.read_bytes() == before  # the old file is untouched
    assert sorted(os.listdir(tmp_path)) == ["cal.h5"]  # no temporary left behind
    monkeypatch.undo()
    meta = dict(loaded.meta, calibration_id="replaced")
    cal.write_calibration(path, meta, loaded.columns, force=True)
    assert cal.load_calibration(path).id == "replaced"
    assert sorted(os.listdir(tmp_path)) == ["cal.h5"]


def test_calibrate_refuses_an_existing_file_before_opening_the_bench(tmp_path: Path) -> None:
    (tmp_path / "cal.h5").write_bytes(b"not mine to replace")
    keeper = Keeper()
    with pytest.raises(BadInput, match="exists"):
        cal.run_calibration(None, None, tmp_path / "cal.h5", session_factory=keeper)
    assert keeper.sessions == [] and (tmp_path / "cal.h5").read_bytes() == b"not mine to replace"


def test_unreadable_files_are_bad_input(tmp_path: Path) -> None:
    (tmp_path / "junk.h5").write_bytes(b"\x89HDF\r\n garbage")
    with pytest.raises(BadInput, match=r"junk\.h5"):
        cal.load_calibration(tmp_path / "junk.h5")
    with h5py.File(tmp_path / "other.h5", "w") as h5:
        h5.attrs["format"] = "something-else"
    with pytest.raises(BadInput, match="not a benchseq calibration"):
        cal.load_calibration(tmp_path / "other.h5")


# -- (4) coverage and conditions flagged ---------------------------------------------------------
@pytest.mark.slow
def test_uncovered_frequencies_and_other_conditions_are_flagged_also_after_resume(
    lab: dict[str, Any], tmp_path: Path
) -> None:
    """A calibration spanning 900 Hz – 110 kHz applied on a bench with the bandwidth limit
    off and a 10:1 output probe: the 100 Hz and 1 MHz points are flagged outside_calibration,
    every point carries the conditions flag, and the meta lists both differences. The run is
    stopped after one point and resumed: the resumed points are flagged the same way."""
    loaded = lab["result"].loaded
    keep = (loaded.columns["frequency"] > 900) & (loaded.columns["frequency"] < 1.1e5)
    narrow = {k: v[keep] for k, v in loaded.columns.items()}
    cal.write_calibration(tmp_path / "narrow.h5", loaded.meta, narrow)
    (tmp_path / "bench.toml").write_text(
        bench_text(
            "narrow.h5",
            **{
                'bandwidth_limit__=__"20 MHz"': 'bandwidth_limit = "off"',
                "output__=__{ channel = 2, probe = 1,": "output = { channel = 2, probe = 10,",
            },
        ),
        encoding="utf-8",
    )
    plan = (PLANS / "demo.toml").read_text(encoding="utf-8")
    plan = plan.replace(
        'frequency = { from = "10 Hz", to = "1 MHz", per_decade = 3 }',
        'frequency = { at = ["100 Hz", "10 kHz", "1 MHz"] }',
    )
    (tmp_path / "plan.toml").write_text(plan, encoding="utf-8")
    stop = StopControl()

    def emit(event: Any) -> None:
        if event.kind == "point_stored":
            stop.request("test stop after one point")

    out = tmp_path / "run.h5"
    first, _ = start_run(
        str(tmp_path / "plan.toml"), str(tmp_path / "bench.toml"), str(out), emit=emit, stop=stop
    )
    assert first.status == "stopped" and first.measured == 1
    again, _ = resume_run(str(out))
    assert again is not None and again.status == "complete" and again.measured == 2
    frame = read_results(out).sort_values("frequency_planned")
    flags = [set(f.split()) for f in frame["flags"]]
    assert [cal.CONDITIONS_FLAG in f for f in flags] == [True, True, True]
    assert ["outside_calibration" in f for f in flags] == [True, False, True]
    assert cal.CONDITIONS_FLAG in FLAG_TEXT
    applied = read_meta(out)["calibration"]
    assert applied["uncovered_frequencies_hz"] == [100.0, 1e6]
    assert any(m.startswith("bandwidth limit") for m in applied["mismatches"])
    assert any(m.startswith("output probe") for m in applied["mismatches"])
    assert len(applied["mismatches"]) == 2


@pytest.mark.slow
def test_condition_mismatches_names_each_difference(lab: dict[str, Any]) -> None:
    loaded = lab["result"].loaded
    bench = load_bench(None)
    assert (
        cal.condition_mismatches(loaded, bench, {"scope": loaded.conditions["scope_identity"]})
        == []
    )
    # a firmware update alone is not a different scope; another serial number is
    same_unit = "benchseq,SIM-SCOPE,SC0001,9.9"
    assert cal.condition_mismatches(loaded, bench, {"scope": same_unit}) == []
    other = cal.condition_mismatches(loaded, bench, {"scope": "benchseq,SIM-SCOPE,DS0777,0.1"})
    assert len(other) == 1 and other[0].startswith("scope:")
    from benchseq.bench import parse_bench
    from benchseq.tomlfile import parse_toml_text

    text, data = parse_toml_text(
        bench_text(
            None,
            **{
                'output__=__{ channel = 2, probe = 1, coupling = "AC" }': (
                    'output = { channel = 3, probe = 1, coupling = "DC" }'
                )
            },
        ),
        "x.toml",
    )
    changed = cal.condition_mismatches(loaded, parse_bench(data, "x.toml", text))
    assert sorted(m.split(":")[0] for m in changed) == ["output channel", "output coupling"]


# -- (5) a missing calibration is refused before anything is switched on ------------------------
def test_missing_calibration_is_bad_input_before_anything_switches_on(tmp_path: Path) -> None:
    (tmp_path / "bench.toml").write_text(bench_text("nowhere.h5"), encoding="utf-8")
    keeper = Keeper()
    with pytest.raises(FileKeyError) as info:
        start_run(
            str(PLANS / "demo.toml"),
            str(tmp_path / "bench.toml"),
            str(tmp_path / "r.h5"),
            session_factory=keeper,
        )
    message = str(info.value)
    assert "bench.toml" in message and "scope.calibration" in message and "nowhere.h5" in message
    assert keeper.sessions == [] and not (tmp_path / "r.h5").exists()
    (tmp_path / "nowhere.h5").write_bytes(b"torn")
    with pytest.raises(FileKeyError, match=r"scope\.calibration"):
        start_run(
            str(PLANS / "demo.toml"),
            str(tmp_path / "bench.toml"),
            str(tmp_path / "r.h5"),
            session_factory=keeper,
        )
    assert keeper.sessions == [] and not (tmp_path / "r.h5").exists()


@pytest.mark.slow
def test_changed_calibration_refuses_resume_with_nothing_switched_on(
    lab: dict[str, Any], tmp_path: Path
) -> None:
    """A stopped run whose calibration file changed since: resume is BadInput before any
    bench session is opened (so nothing is switched on)."""
    loaded = lab["result"].loaded
    cal.write_calibration(tmp_path / "cal.h5", loaded.meta, loaded.columns)
    (tmp_path / "bench.toml").write_text(bench_text("cal.h5"), encoding="utf-8")
    plan = (
        (PLANS / "demo.toml")
        .read_text(encoding="utf-8")
        .replace(
            'frequency = { from = "10 Hz", to = "1 MHz", per_decade = 3 }',
            'frequency = { at = ["1 kHz", "10 kHz"] }',
        )
    )
    (tmp_path / "plan.toml").write_text(plan, encoding="utf-8")
    stop = StopControl()
    stop.request("stop at once")
    keeper = Keeper()
    out = tmp_path / "run.h5"
    first, _ = start_run(
        str(tmp_path / "plan.toml"),
        str(tmp_path / "bench.toml"),
        str(out),
        stop=stop,
        session_factory=keeper,
    )
    assert first.status == "stopped" and first.measured == 0
    cal.write_calibration(
        tmp_path / "cal.h5", dict(loaded.meta, calibration_id="other"), loaded.columns, force=True
    )
    with pytest.raises(BadInput, match="has changed"):
        resume_run(str(out), session_factory=keeper)
    assert len(keeper.sessions) == 1


# -- the real-bench path and the wiring checks ---------------------------------------------------
def test_real_bench_needs_a_plan_and_the_operators_confirmation(tmp_path: Path) -> None:
    text = bench_text(None).replace('simulation = "demo"', "")
    text = text.replace('"SIM::', '"TCPIP::127.0.0.1::5025::SOCKET::')
    (tmp_path / "lab.toml").write_text(text, encoding="utf-8")
    keeper = Keeper()
    with pytest.raises(BadInput, match="--plan"):
        cal.run_calibration(None, tmp_path / "lab.toml", tmp_path / "c.h5", session_factory=keeper)
    asked: list[str] = []

    def operator(message: str) -> bool:
        asked.append(message)
        return False

    with pytest.raises(cal.CalibrationCancelled, match="nothing was switched on"):
        cal.run_calibration(
            PLANS / "demo.toml",
            tmp_path / "lab.toml",
            tmp_path / "c.h5",
            confirm=operator,
            session_factory=keeper,
        )
    assert keeper.sessions == [] and not (tmp_path / "c.h5").exists()
    assert "De-energise" in asked[0] and "local electrical-safety codes" in asked[0]
    assert "CH2" in asked[0] and "pin" in asked[0]


def test_a_probe_left_on_the_output_is_refused() -> None:
    """Rows where the output channel saw the device's output (60 dB down), not the pin."""
    row = {
        "frequency_fitted": 1e3,
        "frequency_planned": 1e3,
        "ratio": 1e-3 + 0j,
        "is_bound": False,
        "pin": 0.05 + 0j,
        "output": 5e-5 + 0j,
        "pin_sigma": 1e-5,
        "output_sigma": 1e-6,
        "pin_range": 0.16,
        "output_range": 0.008,
        "bench_time": 1.0,
        "flags": "",
    }
    with pytest.raises(MeasurementFailure, match="probe"):
        cal.table_from_rows([row])
