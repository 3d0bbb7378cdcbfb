"""The netlist device: a plan rehearsed on a SPICE netlist, with ngspice as the outside truth.

Reference: ngspice (ngspice-39, batch mode, tests/ngspice_ref.py) on a deck the test writes
itself: the injector as built (the simulator's component values, the op-amp as the
single-pole macro-model of tests/ngspice_ref.py) driving the example regulator subcircuit,
with the DC level and the output's DC load of each stored point; an AC analysis at the
stored generator frequency gives 20·log10(|V(pin)| / |V(out)|). The measured values are
judged by their own stated standard uncertainty u (GUM, JCGM 100:2008 §6.2–6.3: an interval
±1.96u covers about 95 % for a normal distribution), pooled over seeds.
"""

from __future__ import annotations

import math
import shutil
import tomllib
from pathlib import Path

import numpy as np
import pytest
from ngspice_ref import ac_analysis, ngspice_version, require_ngspice

from benchseq.bench import load_bench
from benchseq.cli import main
from benchseq.errors import BadInput, MeasurementFailure
from benchseq.plan import load_plan, parse_plan
from benchseq.replay import session_factory_for
from benchseq.runner import preflight_simulation, run_prepared
from benchseq.sim import netlist as netlist_module
from benchseq.sim.devices import OperatingPoint
from benchseq.sim.netlist import (
    NetlistInvalid,
    NetlistNotConverged,
    NgspiceMissing,
    read_netlist,
    subcircuit_ports,
)
from benchseq.sim.scenario import Scenario, load_scenario, parse_scenario
from benchseq.store import read_results, read_truth
from benchseq.tomlfile import parse_toml_text

ROOT = Path(__file__).resolve().parent.parent
SCENARIOS = ROOT / "sim" / "scenarios"
PLAN = ROOT / "plans" / "rehearse-netlist.toml"
NETLIST = SCENARIOS / "fern-ldo.cir"
SUBCIRCUIT = "FERN_LDO33"
SEEDS = (1, 2, 3, 4, 5, 6)  # 192 values pooled: a 93 % coverage check needs that many


# -- the test's own ngspice deck ----------------------------------------------------------------
def truth_deck(scenario: Scenario, netlist: Path, pin_dc: float, output_current: float) -> str:
    """The injector as built plus the device subcircuit, written here from the component
    values (not through benchseq.sim.netlist)."""
    bench = load_bench("sim:netlist-ldo")
    c = scenario.circuit(bench)
    lines = [
        "netlist rehearsal truth",
        "Vemf e 0 DC 0 AC 1",
        # the + input sits at the set-point; the op-amp's gain puts the pin within
        # I·Ro/(1 + A0) (< 1 µV here) of it
        f"Vdc d 0 DC {float(pin_dc)!r}",
        f"Rs e a {c.source_resistance!r}",
        f"Cc a b {c.coupling_capacitor!r}",
        f"Rin b n {c.input_resistor!r}",
        f"Rf p n {c.feedback_resistor!r}",
        f"Rb d q {c.bias_resistor!r}",
        f"Cb q 0 {c.bias_capacitor!r}",
        "Gamp 0 x q n 1",
        f"Rpole x 0 {c.open_loop_gain!r}",
        f"Cpole x 0 {1.0 / (2.0 * math.pi * c.gain_bandwidth)!r}",
        "Ebuf o 0 x 0 1",
        f"Ro o p {c.output_resistance!r}",
        f"Cpin p c {c.pin_capacitance!r}",
        f"Resr c 0 {c.pin_capacitor_esr!r}",
        f'.include "{netlist}"',
        f"Iboard out 0 DC {float(output_current)!r}",
        f"Xdut p out 0 {SUBCIRCUIT}",
    ]
    return "\n".join(lines) + "\n"


def truth_rejection(
    scenario: Scenario, netlist: Path, pin_dc: float, current: float, freqs: np.ndarray
) -> np.ndarray:
    result = ac_analysis(truth_deck(scenario, netlist, pin_dc, current), ["p", "out"], freqs)
    return 20.0 * np.log10(np.abs(result["p"]) / np.abs(result["out"]))


def compare_with_truth(
    path: Path, scenario: Scenario, netlist: Path, board_load: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(error/u of values, bound − truth of bounds, measured values, truth of values)."""
    rows = read_results(path)
    truth = read_truth(path).set_index("point_id").loc[rows["point_id"]]
    load = np.nan_to_num(rows["load_current"].to_numpy(dtype=float), nan=0.0)
    truths = np.empty(len(rows))
    keys = rows["dc_level"].to_numpy(dtype=float)
    for dc in np.unique(keys):
        for i_load in np.unique(load):
            pick = (keys == dc) & (load == i_load)
            if not pick.any():
                continue
            pin_dc = float(np.median(truth["pin_dc"].to_numpy(dtype=float)[pick]))
            freqs = rows["frequency"].to_numpy(dtype=float)[pick]
            truths[pick] = truth_rejection(scenario, netlist, pin_dc, board_load + i_load, freqs)
    bound = rows["is_bound"].to_numpy(dtype=bool)
    value = rows["rejection_db"].to_numpy(dtype=float)
    u = rows["uncertainty_db"].to_numpy(dtype=float)
    errors = (value[~bound] - truths[~bound]) / u[~bound]
    bound_excess = rows["bound_db"].to_numpy(dtype=float)[bound] - truths[bound]
    return errors, bound_excess, value[~bound], truths[~bound]


@pytest.fixture(scope="module")
def rehearsals(tmp_path_factory: pytest.TempPathFactory) -> list[Path]:
    """`benchseq run plans/rehearse-netlist.toml --bench sim:netlist-ldo` for each seed."""
    require_ngspice()
    folder = tmp_path_factory.mktemp("rehearsal")
    paths = []
    for seed in SEEDS:
        out = folder / f"seed{seed}.h5"
        code = main(
            ["run", str(PLAN), "--bench", "sim:netlist-ldo", "--out", str(out), "--seed", str(seed)]
        )
        assert code == 0
        paths.append(out)
    return paths


@pytest.mark.slow
def test_rehearsal_agrees_with_ngspice_ac_analysis_of_the_same_netlist(
    rehearsals: list[Path],
) -> None:
    """Every stored value against ngspice's AC analysis of injector + netlist (ngspice-39):
    truth within ±1.96u for ≥ 93 % pooled over seeds (JCGM 100 §6.3: k = 1.96 ↔ 95 % for a
    normal distribution), none beyond 4u, every bound at or below the truth at ≥ 95 %."""
    scenario = load_scenario("netlist-ldo")
    board = scenario.device.board_load_current  # type: ignore[attr-defined]
    errors, excess = [], []
    for path in rehearsals:
        e, b, _, _ = compare_with_truth(path, scenario, NETLIST, board)
        errors.append(e)
        excess.append(b)
    e = np.concatenate(errors)
    b = np.concatenate(excess)
    version = ngspice_version()
    assert version.startswith("ngspice-"), version
    assert e.size >= 80
    inside = np.mean(np.abs(e) <= 1.96)
    assert inside >= 0.93, f"{inside:.3f} of values within 1.96u of {version}"
    assert np.max(np.abs(e)) <= 4.0, f"worst |error|/u {np.max(np.abs(e)):.2f} against {version}"
    if b.size:
        assert np.mean(b <= 0.0) >= 0.95, f"bounds above the truth: {b[b > 0]}"


K_AMPLITUDE = 5.0  # σ_c multiples (see the faint-ripple test's docstring)

FAINT_PLAN = """
title = "faint ripple on a noisy board: where the output sinks into the floor"
[device]
name = "FERN_LDO33 regulator (netlist model), noisy output"
absolute_max = "6 V"
min_operating = "3.5 V"
[sweep]
dc = ["5 V"]
ripple = ["4 mVpp"]
frequency = { from = "20 Hz", to = "20 kHz", per_decade = 2 }
[capture]
max_time = "0.5 s"
target_uncertainty = "0.5 dB"
"""


@pytest.mark.slow
def test_bounds_on_a_noisy_board_stay_at_or_below_ngspice_truth(tmp_path: Path) -> None:
    """The same netlist with 2 µV/√Hz of output noise and a 4 mVpp ripple: most points end
    as lower bounds. Every bound at or below ngspice's truth at ≥ 95 % pooled over seeds
    (ngspice-39, the test's own deck).

    The values resolved there sit just above the value threshold (A/σ_c of 5 to 15), where
    the dB uncertainty u = σ_c/A is first-order only and a weak output lifted over the
    threshold by noise misses by far more than 4u in dB (seen: A/σ_c 5.7 read from a true
    2.4). What the point states exactly is σ_c, the noise per quadrature (output_floor):
    the measured amplitude is within K_AMPLITUDE·σ_c of the true one. With σ_c estimated
    from 2·n neighbour quadratures, (A − A_true)²/(2σ̂_c²) is at most F(2, 2n)-distributed,
    whose tail (1 + 2x/(2n))^(−n) (Abramowitz & Stegun 26.6.4, from memory) at x = 12.5
    and n ≥ 18 is under 1e-4 per value."""
    require_ngspice()
    text = (SCENARIOS / "netlist-ldo.toml").read_text(encoding="utf-8")
    noisy = text.replace("white_noise_nv_per_root_hz = 40", "white_noise_nv_per_root_hz = 2000")
    assert noisy != text
    (tmp_path / "fern-ldo.cir").write_text(NETLIST.read_text(encoding="utf-8"))
    source = str(tmp_path / "noisy.toml")
    _, data = parse_toml_text(noisy, source)
    scenario = parse_scenario(data, source, tmp_path)
    plan = parse_plan(tomllib.loads(FAINT_PLAN), "faint.toml", FAINT_PLAN)
    bench = load_bench("sim:netlist-ldo")
    board = scenario.device.board_load_current  # type: ignore[attr-defined]
    misses, excess = [], []
    for seed in SEEDS:
        outcome, path = run_prepared(
            plan, bench, tmp_path / f"faint{seed}.h5", seed=seed,
            session_factory=session_factory_for(scenario),
        )  # fmt: skip
        assert outcome.status == "complete"
        _, b, value, truth = compare_with_truth(path, scenario, NETLIST, board)
        excess.append(b)
        rows = read_results(path)
        kept = ~rows["is_bound"].to_numpy(dtype=bool)
        measured = np.abs(rows["output"].to_numpy())[kept]
        sigma_c = rows["output_floor"].to_numpy(dtype=float)[kept]
        # the true output amplitude from the true rejection and the measured pin ripple
        true_amplitude = measured * 10 ** ((value - truth) / 20.0)
        misses.append(np.abs(measured - true_amplitude) / sigma_c)
    b = np.concatenate(excess)
    m = np.concatenate(misses)
    assert b.size >= 25, "the plan should end mostly in bounds"
    assert np.mean(b <= 0.0) >= 0.95, f"bounds above the truth by {b[b > 0]} dB"
    assert m.size == 0 or np.max(m) <= K_AMPLITUDE, f"|A − A_true|/σ_c: {np.round(m, 2)}"


@pytest.mark.slow
def test_rehearsal_file_records_the_netlist_scenario(rehearsals: list[Path]) -> None:
    from benchseq.store import read_meta

    meta = read_meta(rehearsals[0])
    assert meta["simulation"] == "netlist-ldo"
    assert meta["status"] == "complete"
    rows = read_results(rehearsals[0])
    assert len(rows) == load_plan(PLAN).point_count


# -- one component changed ------------------------------------------------------------------------
CHANGE_PLAN = """
title = "netlist component change"
[device]
name = "FERN_LDO33 with another output capacitor"
absolute_max = "6 V"
min_operating = "3.5 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = { at = ["20 kHz", "44 kHz", "95 kHz", "200 kHz"] }
[capture]
max_time = "2 s"
target_uncertainty = "0.1 dB"
"""


def _scenario_with(folder: Path, netlist_text: str) -> Scenario:
    (folder / "fern-ldo.cir").write_text(netlist_text, encoding="utf-8")
    text = (SCENARIOS / "netlist-ldo.toml").read_text(encoding="utf-8")
    source = str(folder / "netlist-ldo.toml")
    _, data = parse_toml_text(text, source)
    return parse_scenario(data, source, folder)


def test_measured_curve_follows_a_changed_output_capacitor(tmp_path: Path) -> None:
    """The output capacitor 4.7 µF → 22 µF: the measured curve moves with ngspice's truth of
    the changed netlist (within 4u), and away from the original netlist's truth."""
    require_ngspice()
    original = NETLIST.read_text(encoding="utf-8")
    changed = original.replace("Cout   vout nesr 4.7u", "Cout   vout nesr 22u")
    assert changed != original
    scenario = _scenario_with(tmp_path, changed)
    plan = parse_plan(tomllib.loads(CHANGE_PLAN), "change.toml", CHANGE_PLAN)
    bench = load_bench("sim:netlist-ldo")
    outcome, path = run_prepared(
        plan, bench, tmp_path / "changed.h5", seed=5, session_factory=session_factory_for(scenario)
    )
    assert outcome.status == "complete"
    board = scenario.device.board_load_current  # type: ignore[attr-defined]
    e_new, _, value, truth_new = compare_with_truth(
        path, scenario, tmp_path / "fern-ldo.cir", board
    )
    rows = read_results(path)
    _, _, _, truth_old = compare_with_truth(path, scenario, NETLIST, board)
    u = rows["uncertainty_db"].to_numpy(dtype=float)[~rows["is_bound"].to_numpy(dtype=bool)]
    assert value.size == 4
    assert np.all(np.abs(e_new) <= 4.0), e_new
    matters = np.abs(truth_new - truth_old) > 10.0 * u  # where the change shows
    assert matters.sum() >= 2, (truth_new, truth_old)
    assert np.all(np.abs(value - truth_old)[matters] > 4.0 * u[matters]), (value, truth_old)


# -- errors a user can act on -----------------------------------------------------------------
def _write_scenario(folder: Path, netlist_name: str, subcircuit: str) -> tuple[dict, str]:
    text = (SCENARIOS / "netlist-ldo.toml").read_text(encoding="utf-8")
    text = text.replace('netlist = "fern-ldo.cir"', f'netlist = "{netlist_name}"')
    text = text.replace('subcircuit = "FERN_LDO33"', f'subcircuit = "{subcircuit}"')
    source = str(folder / "scenario.toml")
    Path(source).write_text(text, encoding="utf-8")
    _, data = parse_toml_text(text, source)
    return data, source


def test_missing_netlist_file_is_bad_input_naming_the_scenario(tmp_path: Path) -> None:
    data, source = _write_scenario(tmp_path, "nowhere.cir", SUBCIRCUIT)
    with pytest.raises(NetlistInvalid) as caught:
        parse_scenario(data, source, tmp_path)
    assert caught.value.exit_code == 2
    assert "scenario.toml" in str(caught.value) and "nowhere.cir" in str(caught.value)


def test_missing_subcircuit_names_the_ones_there(tmp_path: Path) -> None:
    shutil.copy(NETLIST, tmp_path / "fern-ldo.cir")
    data, source = _write_scenario(tmp_path, "fern-ldo.cir", "FERN_LDO50")
    with pytest.raises(NetlistInvalid) as caught:
        parse_scenario(data, source, tmp_path)
    message = str(caught.value)
    assert "FERN_LDO50" in message and "fern_ldo33" in message and "device.subcircuit" in message


def test_subcircuit_with_other_than_three_ports_is_refused(tmp_path: Path) -> None:
    (tmp_path / "four.cir").write_text(
        ".subckt four vin vout gnd en\nR1 vin vout 1k\nR2 vout gnd 1k\nR3 en gnd 1k\n.ends\n"
    )
    with pytest.raises(NetlistInvalid, match="has 4 ports"):
        read_netlist(tmp_path / "four.cir", "four", "s.toml")


def test_subcircuit_ports_read_continuations_and_parameters() -> None:
    text = "* c\n.SUBCKT Reg a\n+ b c params: r=1\nR1 a b {r}\n.ends\n.subckt x p q r s\n.ends\n"
    assert subcircuit_ports(text) == {"reg": ["a", "b", "c"], "x": ["p", "q", "r", "s"]}


def test_ngspice_missing_is_bad_input_saying_how_to_install(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    shutil.copy(NETLIST, tmp_path / "fern-ldo.cir")
    data, source = _write_scenario(tmp_path, "fern-ldo.cir", SUBCIRCUIT)
    monkeypatch.setenv("BENCHSEQ_NGSPICE", "benchseq-no-such-ngspice")
    with pytest.raises(NgspiceMissing) as caught:
        parse_scenario(data, source, tmp_path)
    assert caught.value.exit_code == 2
    assert "ngspice" in str(caught.value) and "install" in str(caught.value)


def test_netlist_that_does_not_parse_quotes_ngspice(tmp_path: Path) -> None:
    require_ngspice()
    broken = NETLIST.read_text(encoding="utf-8").replace(
        "Mpass  vout ea   vin  vin  fern_pass W=1 L=1", "Mpass  vout ea"
    )
    (tmp_path / "broken.cir").write_text(broken, encoding="utf-8")
    data, source = _write_scenario(tmp_path, "broken.cir", SUBCIRCUIT)
    with pytest.raises(NetlistInvalid) as caught:
        parse_scenario(data, source, tmp_path)
    message = str(caught.value)
    assert caught.value.exit_code == 2
    assert "broken.cir" in message and SUBCIRCUIT in message and "mpass" in message.lower()


NO_SOLUTION = """* a subcircuit without a DC solution above 1 V at the pin
.subckt NOSOL vin vout gnd
Rin vin gnd 1k
Bloop vout gnd V = V(vin) > 1 ? V(vout) + 1 : 0
.ends NOSOL
"""


def _no_solution_scenario(folder: Path) -> Scenario:
    (folder / "nosol.cir").write_text(NO_SOLUTION, encoding="utf-8")
    data, source = _write_scenario(folder, "nosol.cir", "NOSOL")
    return parse_scenario(data, source, folder)


def test_operating_point_without_convergence_names_file_subcircuit_and_point(
    tmp_path: Path,
) -> None:
    require_ngspice()
    scenario = _no_solution_scenario(tmp_path)  # at 0 V the circuit loads and solves
    with pytest.raises(NetlistNotConverged) as caught:
        scenario.device.preflight([OperatingPoint(5.0, 0.02)])  # type: ignore[attr-defined]
    message = str(caught.value)
    assert caught.value.exit_code == 1
    assert "nosol.cir" in message and "NOSOL" in message and "pin DC 5 V" in message
    assert "20 mA" in message


def test_run_that_cannot_converge_fails_before_any_file(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """`benchseq run` exits 1 with the point named, and creates no result file."""
    require_ngspice()
    scenario = _no_solution_scenario(tmp_path)
    monkeypatch.setattr("benchseq.sim.scenario.load_scenario", lambda name: scenario)
    out = tmp_path / "never.h5"
    code = main(["run", str(PLAN), "--bench", "sim:netlist-ldo", "--out", str(out)])
    assert code == 1
    assert not out.exists() and not Path(str(out) + ".journal").exists()
    with pytest.raises(MeasurementFailure):
        preflight_simulation(load_plan(PLAN), load_bench("sim:netlist-ldo"))


def test_results_are_cached_per_netlist_and_operating_point() -> None:
    require_ngspice()
    device = load_scenario("netlist-ldo").device
    op = OperatingPoint(4.2, 0.0123)
    runs = netlist_module.CACHE.runs
    first = device.transfer(np.array([1234.5]), op)
    again = device.transfer(np.array([1234.5]), op)
    dc = device.input_current(op)
    assert netlist_module.CACHE.runs == runs + 1
    assert first[0] == again[0]
    assert dc > 0.0123  # the output's load plus the regulator's own bias
    other = load_scenario("netlist-ldo").device  # a new object, the same netlist: cached
    other.transfer(np.array([1234.5]), op)
    assert netlist_module.CACHE.runs == runs + 1


def test_bad_input_class_for_netlist_errors() -> None:
    assert issubclass(NetlistInvalid, BadInput) and issubclass(NgspiceMissing, BadInput)
    assert issubclass(NetlistNotConverged, MeasurementFailure)


# -- model overlay in reports -----------------------------------------------------------------
def device_alone_rejection(netlist: Path, pin_dc: float, current: float, freqs: np.ndarray):
    """The subcircuit driven by an ideal source at the pin (the test's own deck)."""
    deck = "\n".join(
        [
            "device alone",
            f"Vp p 0 DC {float(pin_dc)!r} AC 1",
            f'.include "{netlist}"',
            f"Iboard out 0 DC {float(current)!r}",
            f"Xdut p out 0 {SUBCIRCUIT}",
        ]
    )
    result = ac_analysis(deck + "\n", ["out"], freqs)
    return -20.0 * np.log10(np.abs(result["out"]))


@pytest.mark.slow
def test_report_model_overlay_draws_ngspice_prediction_and_difference(
    rehearsals: list[Path], tmp_path: Path
) -> None:
    """The overlay's prediction is ngspice's AC analysis of the subcircuit at the curve's
    measured pin DC and load (ngspice-39, the test's own deck; 1e-9 dB), and the report
    carries the difference panel."""
    from benchseq.report import write_report
    from benchseq.report.circuit_model import differences, predict
    from benchseq.report.model import gather

    report = gather([rehearsals[0]])
    overlay = predict(report, NETLIST, SUBCIRCUIT, 0.02)
    assert set(overlay.predictions) == {c.index for c in report.curves}
    for curve in report.curves:
        prediction = overlay.predictions[curve.index]
        freqs = curve.frame["frequency"].to_numpy(dtype=float)
        expected = device_alone_rejection(NETLIST, prediction.pin_dc, 0.02, freqs)
        # the device resolves operating points to 1 µV of pin DC: 1e-5 dB covers that here
        assert np.allclose(prediction.rejection_db, expected, rtol=0, atol=1e-5)
        diff, u, _ = differences(overlay, curve)
        assert np.nanmax(np.abs(diff) / u) < 5.0  # the model that was measured
    out = tmp_path / "overlay.html"
    written = write_report([rehearsals[0]], "html", out, model=(NETLIST, SUBCIRCUIT, 0.02))
    text = written[0].read_text(encoding="utf-8")
    assert "model-curve-0" in text  # the predicted curve's SVG group


@pytest.mark.slow
def test_report_model_errors_are_bad_input(rehearsals: list[Path], tmp_path: Path) -> None:
    out = str(tmp_path / "r.html")
    base = ["report", str(rehearsals[0]), "-o", out, "--model", str(NETLIST)]
    assert main([*base, "--subcircuit", "NOPE"]) == 2
    assert main(base) == 2  # no --subcircuit
    assert main([*base, "--subcircuit", SUBCIRCUIT, "--model-load", "3 parsecs"]) == 2
    assert not Path(out).exists()
