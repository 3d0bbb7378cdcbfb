"""Replay on the simulated bench (learned device and scenario devices) and re-analysis from
stored waveforms.

Outside references: scipy.interpolate.PchipInterpolator for the learned curve, the
simulator's truth (sim/, which never imports the analysis) for scenario replays, and the
stored measurement itself for the learned replays."""

from __future__ import annotations

import io
import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from rich.console import Console
from scipy.interpolate import PchipInterpolator

from benchseq import sequencer
from benchseq.errors import BadInput
from benchseq.reanalyse import reanalyse, render_reanalysis
from benchseq.replay import COVERAGE_K, read_stored, render_comparison, replay
from benchseq.runner import start_run
from benchseq.sim.devices import OperatingPoint
from benchseq.sim.learned import BOUND_MARGIN_DB, Pchip, front_end_noise, learn_device
from benchseq.sim.scenario import load_scenario
from benchseq.store import StoredWaveform, read_meta, read_results

PLANS = Path(__file__).resolve().parent.parent / "plans"

# Short captures leave the high-rejection points at low frequency under the floor; the long
# plan is the same sweep with room for longer captures (Fernhollow bay 2, FV-33 board).
SHORT_PLAN = """
title = "FV-33 quick look with short captures"
operator = "T. Varga-Ellison"
[device]
name = "FV-33 regulator evaluation board"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["10 mVpp"]
frequency = { at = ["100 Hz", "220 Hz", "1 kHz", "4.7 kHz"] }
[settle]
after_operating_point = "0.5 s"
[capture]
min_cycles = 10
max_time = "0.05 s"
target_uncertainty = "0.2 dB"
"""
LONG_PLAN = SHORT_PLAN.replace('max_time = "0.05 s"', 'max_time = "10 s"').replace(
    "short captures", "room for long captures"
)


def _widened(original: Any) -> Any:
    """Keep 8-bit records as int16 (same codes, same scaling) so that points captured with
    and without scope averaging can share one stored dtype per channel."""

    def keep(self: Any) -> Any:
        kept = original(self)
        if not kept:
            return kept
        return {
            name: StoredWaveform(
                np.asarray(w.samples).astype(np.int16), w.scale, w.offset, w.sample_interval, w.unit
            )
            if np.asarray(w.samples).dtype == np.int8
            else w
            for name, w in kept.items()
        }

    return keep


def _run(plan: str, out: Path, keep_waveforms: bool, seed: int = 0) -> Path:
    with pytest.MonkeyPatch.context() as mp:
        if keep_waveforms:
            mp.setattr(
                sequencer.Sequencer,
                "_waveforms_to_keep",
                _widened(sequencer.Sequencer._waveforms_to_keep),
            )
        outcome, path = start_run(plan, None, str(out), keep_waveforms=keep_waveforms, seed=seed)
    assert outcome.status == "complete", outcome.reason
    return path


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("replay")
    (path / "short.toml").write_text(SHORT_PLAN, encoding="utf-8")
    (path / "long.toml").write_text(LONG_PLAN, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def demo_run(folder: Path) -> Path:
    return _run(str(PLANS / "demo.toml"), folder / "demo.h5", keep_waveforms=True)


@pytest.fixture(scope="module")
def short_run(folder: Path) -> Path:
    path = _run(str(folder / "short.toml"), folder / "short.h5", keep_waveforms=False)
    assert read_results(path)["is_bound"].sum() >= 1, "the short plan should leave a bound"
    return path


@pytest.fixture(scope="module")
def learned_replay(demo_run: Path, folder: Path) -> Any:
    return replay(demo_run, device="learned", out=folder / "demo-learned.h5")


# -- (1) the learned device reproduces the stored curve ------------------------------------
@pytest.mark.slow
def test_learned_replay_reproduces_the_stored_curve(demo_run: Path, learned_replay: Any) -> None:
    """Acceptance: every detected stored point is replayed within k·u_c (k = 3)."""
    stored = read_results(demo_run)
    detected = int((~stored["is_bound"]).sum())
    c = learned_replay.comparison
    assert learned_replay.run.status == "complete"
    assert learned_replay.summary["compared"] == detected == len(c)
    assert bool(c["within"].all()), c[["frequency", "difference_db", "combined_u_db"]]
    assert (c["match"] == "same").all() and (c["op_match"] == "same").all()
    z = np.abs(c["difference_db"] / c["combined_u_db"])
    assert np.all(z <= COVERAGE_K)
    assert learned_replay.summary["max_abs_z"] == pytest.approx(float(z.max()))


@pytest.mark.slow
def test_learned_replay_floor_follows_the_stored_floor(demo_run: Path, learned_replay: Any) -> None:
    """The learned noise (stored floor minus the simulated scope's own noise) gives back a
    floor within a factor 1.5 of the stored one at every point (same capture settings)."""
    stored = read_results(demo_run).set_index("point_id")
    replayed = read_results(learned_replay.path).set_index("point_id")
    same = stored["sample_interval"] == replayed["sample_interval"]
    assert same.sum() >= 12
    ratio = (replayed["output_floor"] / stored["output_floor"])[same]
    assert ratio.between(1 / 1.5, 1.5).all(), ratio


# -- (2) the learned curve is the stored ratios, interpolated as scipy's PCHIP -------------
def test_learned_transfer_is_stored_ratios_and_scipy_pchip_between(demo_run: Path) -> None:
    stored = read_stored(demo_run)
    scenario = load_scenario("demo")
    device = learn_device(
        stored.points,
        standin=scenario.device,
        scope=scenario.scope,
        output_probe=stored.bench.scope.output.probe,
        bandwidth_limit=stored.bench.scope.bandwidth_limit,
    )
    frame = stored.points.sort_values("frequency")
    f = frame["frequency"].to_numpy()
    ratio = frame["ratio"].to_numpy()
    curve = device.curves[0]
    op = OperatingPoint(curve.pin_dc, curve.output_current)
    assert len(device.curves) == 1 and device.curve_for(op)[1]
    # at the stored frequencies: the stored ratios themselves
    np.testing.assert_allclose(device.transfer(f, op), ratio, rtol=1e-12)
    # between them: scipy's PchipInterpolator on log10 f, log10|H| and unwrapped phase
    lf = np.log10(f)
    mag = PchipInterpolator(lf, np.log10(np.abs(ratio)))
    phase = PchipInterpolator(lf, np.unwrap(np.angle(ratio)))
    between = np.sqrt(f[1:] * f[:-1])
    expected = 10 ** mag(np.log10(between)) * np.exp(1j * phase(np.log10(between)))
    np.testing.assert_allclose(device.transfer(between, op), expected, rtol=1e-12)
    # outside the stored span the end values are held
    np.testing.assert_allclose(
        device.transfer(np.array([1.0, 1e8]), op), ratio[[0, -1]], rtol=1e-12
    )


@pytest.mark.parametrize("n", [1, 2, 3, 4, 9, 30])
def test_pchip_matches_scipy(n: int) -> None:
    """Knots with sign changes, flat runs and uneven spacing: same values as scipy inside,
    the end values outside (scipy would extrapolate; the learned device holds)."""
    rng = np.random.default_rng(n)
    x = np.cumsum(rng.uniform(0.05, 1.0, n))
    y = np.round(rng.normal(0, 1, n), 1)  # rounding makes equal neighbours (flat runs)
    if n >= 4:
        y[1] = y[2]
    ours = Pchip(x, y)
    inside = np.linspace(x[0], x[-1], 301)
    if n == 1:
        assert np.all(ours(inside) == y[0])
        return
    np.testing.assert_allclose(
        ours(inside), PchipInterpolator(x, y)(inside), rtol=1e-12, atol=1e-12
    )
    np.testing.assert_allclose(ours(np.array([x[0] - 5, x[-1] + 5])), [y[0], y[-1]])


@pytest.mark.parametrize(("full_scale", "limit"), [(0.008, 20e6), (0.8, None)])
def test_scope_noise_formula_is_what_the_simulated_scope_produces(
    demo_run: Path, full_scale: float, limit: float | None
) -> None:
    """The learned device takes the simulated scope's own noise out with front_end_noise:
    that figure must be what the simulated scope's records show. Records of a quiet node
    (no ripple, no node noise) on a range where the noise is about a code: their variance
    is the front end's plus the rounding's q²/12 (GUM, JCGM 100:2008, F.2.2.1; additive
    here since the noise spans about a step). The sample standard deviation of N values
    has relative standard uncertainty 1/√(2(N−1)) (normal noise; GUM, JCGM 100:2008, E.4.3,
    from memory);
    each of several seeds lies within K = 4 of them."""
    from benchseq.drivers.session import open_session
    from benchseq.sim.synth import NodeSignal, acquire_channel

    stored = read_stored(demo_run)
    session = open_session(stored.bench)
    try:
        sim = session.simulator
        session.scope.configure_channel(2, full_scale, 0.0, "AC", limit)
        setup = sim.scope.channel_setup(2)
        expected = front_end_noise(sim.scenario.scope, setup.full_scale, setup.bandwidth_limit)
    finally:
        session.close()
    quiet = NodeSignal(
        dc=0.0, frequencies=np.array([]), phasors=np.array([], dtype=complex),
        white_noise=0.0, flicker_corner=0.0, noise_bandwidth=1e6,
    )  # fmt: skip
    q = setup.full_scale / 256.0
    n = 20000
    for seed in range(5):
        record = acquire_channel(
            np.random.default_rng(seed), quiet, setup, probe=1.0, points=n,
            sample_interval=1e-6, averages=1, synchronous=True, trigger_jitter=0.0,
        )  # fmt: skip
        measured = float(np.std(record.codes.astype(float), ddof=1)) * q
        with_rounding = math.sqrt(expected**2 + q**2 / 12.0)
        assert 0.5 < expected / q < 2.0  # the regime where the rounding adds q²/12
        u = with_rounding / math.sqrt(2.0 * (n - 1))
        assert abs(measured - with_rounding) <= 4.0 * u, (seed, measured, with_rounding)


# -- (3) bounds stay bounds and are never reproduced values --------------------------------
def test_bounds_are_not_counted_reproduced(short_run: Path, folder: Path) -> None:
    stored = read_results(short_run)
    bounds = stored[stored["is_bound"]]
    outcome = replay(short_run, device="learned", out=folder / "short-learned.h5")
    c = outcome.comparison.set_index("point_id")
    marked = c.loc[bounds["point_id"]]
    assert marked["reference_from_bound"].all()
    assert not marked["compared"].any() and marked["within"].isna().all()
    assert not marked["verdict"].str.startswith("reproduced").any()
    # on the same plan the device (bound + margin) stays under the floor
    assert marked["replay_is_bound"].all(), marked[["replay_db", "replay_bound_db"]]
    assert outcome.summary["still_bound"] == len(bounds)
    assert outcome.summary["compared"] == int((~stored["is_bound"]).sum())
    # the learned knots at bounds sit at the bound plus the margin, marked
    curve = outcome.model.curves[0]
    assert curve.from_bound.sum() == len(bounds)
    np.testing.assert_allclose(
        -20 * curve.log_magnitude[curve.from_bound],
        bounds.sort_values("frequency")["bound_db"].to_numpy() + BOUND_MARGIN_DB,
    )


# -- (4) a scenario's device: compared with the simulator's truth --------------------------
@pytest.mark.slow
def test_scenario_replay_agrees_with_the_simulators_truth(demo_run: Path, folder: Path) -> None:
    """--device demo, another seed: the replay is an independent measurement of the demo
    device. Above the AC-coupling region (≥ 200 Hz, as in test_run_sim) each value is
    within k·u of the truth plus the demo scope's uncalibrated channel mismatch (channel 2
    0.3 % high and the 10.02:1 pin probe: 0.043 dB); and the stored run agrees with it."""
    outcome = replay(demo_run, device="demo", out=folder / "demo-demo.h5", seed=1)
    c = outcome.comparison
    assert outcome.replay_of["device"] == "demo" and outcome.run.status == "complete"
    band = c[(c["frequency"] >= 200) & ~c["replay_is_bound"]]
    assert len(band) >= 12
    mismatch = 20 * math.log10(1.003 * 10.02 / 10.0)
    error = band["truth_difference_db"].abs()
    assert np.all(error <= COVERAGE_K * band["replay_u_db"] + mismatch), band[
        ["frequency", "replay_db", "truth_db", "replay_u_db"]
    ]
    assert bool(c["within"].dropna().all())


# -- (5) a better plan resolves a stored bound ---------------------------------------------
def test_longer_captures_resolve_the_stored_bounds(short_run: Path, folder: Path) -> None:
    outcome = replay(
        short_run, plan_path=folder / "long.toml", device="learned", out=folder / "short-long.h5"
    )
    c = outcome.comparison
    bounds = c[c["reference_from_bound"]]
    assert len(bounds) >= 1
    assert bounds["resolved_now"].all() and not bounds["replay_is_bound"].any()
    assert outcome.summary["resolved_now"] == len(bounds)
    assert outcome.replay_of["plan_changed"] is True
    # the time it costs: planned and simulated
    assert outcome.planned_bench_time_s > 0
    assert outcome.replay_points_bench_time_s > 2 * outcome.stored_bench_time_s
    assert outcome.simulated_bench_time_s > outcome.replay_points_bench_time_s
    text = _text(outcome)
    assert "resolved now" in text and "bench time" in text


# -- (6) re-analysis from stored waveforms -------------------------------------------------
@pytest.mark.slow
def test_reanalysis_gives_the_stored_numbers(demo_run: Path, folder: Path) -> None:
    outcome = reanalyse(demo_run, folder / "demo-reanalysed.h5")
    c = outcome.comparison
    assert outcome.reanalysed == 16 and outcome.copied == 0
    # every capture of the demo read one waveform: the same record was analysed
    assert c["identical"].all(), c[["frequency", "stored_db", "new_db"]]
    assert (c["flags_before"] == c["flags_after"]).all()
    assert c["within"].dropna().all()
    stored, new = read_results(demo_run), read_results(outcome.path)
    np.testing.assert_allclose(new["ratio"], stored["ratio"], rtol=1e-9)
    meta = read_meta(outcome.path)
    assert meta["reanalysed_from"]["run_id"] == read_meta(demo_run)["run_id"]
    assert meta["run_id"] != read_meta(demo_run)["run_id"] and meta["status"] == "complete"
    assert "identical" in _text_of(render_reanalysis(outcome))
    assert json.loads(json.dumps(outcome.to_dict(), allow_nan=False))["identical"] == 16


def test_reanalysis_without_waveforms_is_bad_input(short_run: Path, folder: Path) -> None:
    with pytest.raises(BadInput, match=r"short\.h5.*--keep-waveforms"):
        reanalyse(short_run, folder / "never.h5")
    assert not (folder / "never.h5").exists()


# -- (7) what the replay records; bad inputs -----------------------------------------------
@pytest.mark.slow
def test_replay_file_records_what_it_replayed(demo_run: Path, learned_replay: Any) -> None:
    meta = read_meta(learned_replay.path)
    stored = read_meta(demo_run)
    of = meta["replay_of"]
    assert of["file"] == str(demo_run) and of["run_id"] == stored["run_id"]
    assert of["plan_sha256"] == stored["plan_sha256"] and of["device"] == "learned"
    assert of["plan_changed"] is False and meta["simulated"] is True
    text = _text(learned_replay)
    assert "16 of 16 compared points within" in text
    figures = json.loads(json.dumps(learned_replay.to_dict(), allow_nan=False))
    assert figures["replay_of"] == of and len(figures["points"]) == 16


def test_replay_bad_inputs_name_what_is_wrong(demo_run: Path, folder: Path) -> None:
    with pytest.raises(BadInput, match=r"missing-run\.h5"):
        replay(folder / "missing-run.h5")
    with pytest.raises(BadInput, match="no-such-board"):
        replay(demo_run, device="no-such-board", out=folder / "x.h5")
    with pytest.raises(BadInput, match=r"absent-plan\.toml"):
        replay(demo_run, plan_path=folder / "absent-plan.toml", out=folder / "y.h5")
    with pytest.raises(BadInput, match="already exists"):
        replay(demo_run, out=demo_run)


@pytest.mark.slow
def test_render_escapes_markup(learned_replay: Any) -> None:
    learned_replay.notes.append("[bold]not markup[/bold]")
    try:
        assert "[bold]not markup[/bold]" in _text(learned_replay)
    finally:
        learned_replay.notes.pop()


def _text_of(renderable: Any) -> str:
    console = Console(record=True, width=200, file=io.StringIO())
    console.print(renderable)
    return console.export_text()


def _text(outcome: Any) -> str:
    return _text_of(render_comparison(outcome))


# -- a stored real bench -------------------------------------------------------------------
def _as_real_bench_run(source: Path, out: Path) -> Path:
    """The short run's points as if measured on a real bench: the demo bench file with LAN
    addresses and no simulation (the points themselves are copied)."""
    from benchseq.reanalyse import columns_of
    from benchseq.store import RunWriter

    meta = read_meta(source)
    text = meta["bench_text"].replace('simulation = "demo"', "# no simulation: a real bench")
    for role, port in (("generator", 5025), ("supply", 5026), ("scope", 5027)):
        text = text.replace(f'"SIM::{role}"', f'"TCPIP::192.0.2.10::{port}::SOCKET"')
    meta.update(
        run_id="real-bench-copy", bench_text=text, bench_source="bay2.bench.toml",
        simulated=False, simulation="",
    )  # fmt: skip
    points = read_results(source)
    writer = RunWriter.create(out, meta, columns_of(points))
    for row in points.to_dict(orient="records"):
        writer.append(int(row["point_id"]), row)
    writer.finish("complete")
    return out


def test_stored_real_bench_becomes_a_simulated_one(short_run: Path, folder: Path) -> None:
    """Instrument truths from the demo scenario, the injector exactly as the bench file
    states (the scenario's own as-built values belong to its board)."""
    real = _as_real_bench_run(short_run, folder / "real.h5")
    assert read_stored(real).bench.simulation is None
    outcome = replay(real, device="learned", out=folder / "real-learned.h5")
    assert outcome.run.status == "complete"
    assert outcome.replay_of["stored_bench"] == "real"
    assert outcome.replay_of["instrument_truths"] == "demo"
    circuit = outcome.simulators[0].circuit
    bench = read_stored(real).bench
    assert circuit.coupling_capacitor == bench.injector.coupling_capacitor  # 10 uF, not 10.8
    assert circuit.source_resistance == bench.generator.source_resistance
    assert any("real one" in note for note in outcome.notes)
    meta = read_meta(outcome.path)
    assert meta["simulated"] is True and meta["simulation"] == "demo"
    assert bool(outcome.comparison["within"].dropna().all())


# -- matching a new plan's points ----------------------------------------------------------
def test_new_frequencies_compare_with_the_interpolated_curve(demo_run: Path) -> None:
    """Points between stored frequencies are compared with the learned curve there (scipy's
    PCHIP of rejection over log f is the reference) and marked; outside the span and at an
    operating point never stored nothing is compared."""
    from benchseq.replay import compare_points

    stored = read_stored(demo_run)
    scenario = load_scenario("demo")
    device = learn_device(
        stored.points,
        standin=scenario.device,
        scope=scenario.scope,
        output_probe=1.0,
        bandwidth_limit=20e6,
    )
    frame = stored.points.sort_values("frequency").reset_index(drop=True)
    f = frame["frequency"].to_numpy()
    reference = PchipInterpolator(np.log10(f), -20 * np.log10(np.abs(frame["ratio"].to_numpy())))
    new = frame.iloc[:4].copy()
    planned = frame["frequency_planned"].to_numpy()
    new["frequency_planned"] = [np.sqrt(f[0] * f[1]), np.sqrt(f[5] * f[6]), 5e6, planned[2]]
    new["dc_level"] = [5.0, 5.0, 5.0, 4.5]
    new["rejection_db"] = reference(np.log10(new["frequency_planned"].to_numpy())) + 0.01
    new["uncertainty_db"] = 0.1
    new["is_bound"] = False
    c = compare_points(stored.points, new, None, device)
    assert list(c["match"]) == ["interpolated", "interpolated", "outside_span", "same"]
    assert list(c["op_match"]) == ["same", "same", "same", "nearest"]
    np.testing.assert_allclose(
        c["stored_db"][:2], reference(np.log10(new["frequency_planned"][:2])), rtol=1e-12
    )
    u = frame["uncertainty_db"].to_numpy()
    assert c["stored_u_db"][0] == max(u[0], u[1]) and c["stored_u_db"][1] == max(u[5], u[6])
    assert list(c["compared"]) == [True, True, False, False]
    assert c["within"][:2].all() and c["within"][2:].isna().all()
    assert c["verdict"][0] == "reproduced (interpolated)"
    assert c["stored_point_id"][3] == frame["point_id"][2]  # the nearest stored operating point
    assert c["verdict"][3] == "not compared: operating point not stored"
