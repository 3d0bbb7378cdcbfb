"""The netlist device's large-signal mode: a transient analysis at the points a scenario
chooses, with ngspice as the outside truth.

References:
- ngspice (the version `ngspice --version` prints; ngspice-39 here), AC analysis of decks the
  test writes itself (tests/ngspice_ref.py and tests/test_sim_netlist.py's truth deck): at a
  ripple small against the circuit's range, a transient answer at the fundamental is the
  small-signal transfer (superposition, any circuit text on linear networks); measured values
  judged by their stated standard uncertainty u (GUM, JCGM 100:2008 §6.2–6.3).
- A regulator whose pin falls below its output plus its dropout stops regulating: the output
  follows the pin's troughs (common practice), so a linearity repeat at a smaller ripple
  measures another rejection and the run flags it "nonlinear".
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
from ngspice_ref import ac_reference, ngspice_version, require_ngspice
from test_sim_netlist import compare_with_truth

from benchseq.bench import load_bench
from benchseq.cli import main
from benchseq.errors import FileKeyError
from benchseq.plan import parse_plan
from benchseq.replay import session_factory_for
from benchseq.runner import run_prepared
from benchseq.sim import netlist as netlist_module
from benchseq.sim.devices import OperatingPoint
from benchseq.sim.netlist import NetlistNotConverged
from benchseq.sim.scenario import Scenario, parse_scenario
from benchseq.store import read_results, read_truth
from benchseq.tomlfile import parse_toml_text

ROOT = Path(__file__).resolve().parent.parent
SCENARIOS = ROOT / "sim" / "scenarios"
NETLIST = SCENARIOS / "fern-ldo.cir"
SUBCIRCUIT = "FERN_LDO33"


def _scenario(
    folder: Path, large_signal: str, netlist_text: str | None = None, subcircuit: str = ""
) -> Scenario:
    """sim/scenarios/netlist-ldo.toml with a [device.large_signal] table, in ``folder``
    (optionally on another netlist, written as other.cir, and subcircuit)."""
    text = (SCENARIOS / "netlist-ldo.toml").read_text(encoding="utf-8")
    if netlist_text is not None:
        text = text.replace('netlist = "fern-ldo.cir"', 'netlist = "other.cir"')
        text = text.replace('subcircuit = "FERN_LDO33"', f'subcircuit = "{subcircuit}"')
        (folder / "other.cir").write_text(netlist_text, encoding="utf-8")
    (folder / "fern-ldo.cir").write_text(NETLIST.read_text(encoding="utf-8"), encoding="utf-8")
    text += "\n" + large_signal
    source = str(folder / "large.toml")
    Path(source).write_text(text, encoding="utf-8")
    _, data = parse_toml_text(text, source)
    return parse_scenario(data, source, folder)


def _run(plan_text: str, scenario: Scenario, out: Path, seed: int) -> Path:
    plan = parse_plan(tomllib.loads(plan_text), "plan.toml", plan_text)
    outcome, path = run_prepared(
        plan, load_bench("sim:netlist-ldo"), out, seed=seed,
        session_factory=session_factory_for(scenario),
    )  # fmt: skip
    assert outcome.status == "complete"
    return path


# -- (a) dropout at a large ripple is flagged -----------------------------------------------------
DROPOUT_PLAN = """
title = "near dropout"
[device]
name = "FERN_LDO33 at 3.6 V in"
absolute_max = "6 V"
min_operating = "3 V"
[sweep]
dc = ["3.6 V"]
ripple = ["800 mVpp"]
frequency = { at = ["1 kHz"] }
[capture]
max_time = "1 s"
target_uncertainty = "0.1 dB"
[linearity]
at = ["1 kHz"]
factors = [0.1]
tolerance = "1 dB"
"""


@pytest.mark.slow
def test_dropout_at_a_large_ripple_is_flagged_only_in_large_signal_mode(tmp_path: Path) -> None:
    """At 3.6 V DC an 800 mVpp ripple takes the pin to 3.2 V, below the 3.3 V output plus
    its dropout: the transient output follows the troughs (harmonics, a larger fundamental),
    the repeat at 80 mVpp does not, and the run flags the repeat "nonlinear" (beyond the
    plan's 1 dB). The same runs in small-signal mode flag nothing of the kind."""
    require_ngspice()
    runs = netlist_module.CACHE.transient_runs
    on = _scenario(tmp_path, '[device.large_signal]\npin_dc_below = "4 V"\n')
    off = _scenario(tmp_path, "[device.large_signal]\nenabled = false\n")
    for seed in (1, 2):
        large = read_results(_run(DROPOUT_PLAN, on, tmp_path / f"on{seed}.h5", seed))
        small = read_results(_run(DROPOUT_PLAN, off, tmp_path / f"off{seed}.h5", seed))
        assert "nonlinear" in str(large.loc[large["repeat_of"] == 0, "flags"].iloc[0]).split()
        for flags in small["flags"]:
            assert "nonlinear" not in str(flags).split()
        # the large ripple's rejection falls by far more than the tolerance
        base = large.loc[large["point_id"] == 0, "rejection_db"].iloc[0]
        linear = small.loc[small["point_id"] == 0, "rejection_db"].iloc[0]
        assert linear - base > 10.0
    truth = read_truth(tmp_path / "on1.h5").set_index("point_id")
    assert truth.loc[0, "rejection_db"] < truth.loc[1, "rejection_db"] - 10.0
    assert netlist_module.CACHE.transient_runs > runs


def test_transient_output_in_dropout_carries_harmonics(tmp_path: Path) -> None:
    """In dropout the output's troughs are cut: its second harmonic is a sizeable share of
    the fundamental (a clipped sine, common practice), and its mean level falls below the
    regulated DC; at a small ripple the same point stays a sine (harmonics under 1e-4)."""
    require_ngspice()
    device = _scenario(tmp_path, "[device.large_signal]\n").device
    op = OperatingPoint(3.6, 0.02)
    big = device.large_signal(1e3, np.array([0.4 + 0j]), op)  # type: ignore[attr-defined]
    small = device.large_signal(1e3, np.array([0.004 + 0j]), op)  # type: ignore[attr-defined]
    assert abs(big.harmonics[1]) > 0.2 * abs(big.harmonics[0])
    assert big.mean < device.output_dc(op) - 0.01
    assert np.max(np.abs(small.harmonics[1:])) < 1e-4 * abs(small.harmonics[0])


# -- (b) small ripple: the transient answer is the AC answer ------------------------------------------
def test_small_ripple_transient_fundamental_is_ngspice_ac_transfer(tmp_path: Path) -> None:
    """The device alone, pin at 5 V with a 4 mVpp ripple at any phase: the transient's
    fundamental over the pin's equals ngspice's AC analysis of the subcircuit (the test's
    own deck; ngspice version printed by `ngspice --version`) to 5e-4 relative (a 256-step
    trapezoidal period errs by about (ωh)²/12 ≈ 5e-5)."""
    require_ngspice()
    version = ngspice_version()
    device = _scenario(tmp_path, "[device.large_signal]\n").device
    op = OperatingPoint(5.0, 0.02)
    freqs = np.array([50.0, 2e3, 30e3])
    deck = "\n".join(
        [
            "device alone",
            "Vp p 0 DC 5 AC 1",
            NETLIST.read_text(encoding="utf-8"),  # inline: the stored answer's key is the deck
            "Iboard out 0 DC 0.02",
            f"Xdut p out 0 {SUBCIRCUIT}",
        ]
    )
    reference = ac_reference(deck + "\n", ["out"], freqs)["out"]
    for f, expected in zip(freqs, reference, strict=True):
        pin = np.array([0.002 * np.exp(1.1j)])
        answer = device.large_signal(f, pin, op)  # type: ignore[attr-defined]
        ratio = answer.harmonics[0] / pin[0]
        assert abs(ratio / expected - 1.0) < 5e-4, (version, f, ratio, expected)


SMALL_PLAN = """
title = "small ripple through the transient analysis"
[device]
name = "FERN_LDO33"
absolute_max = "6 V"
min_operating = "3.5 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = { at = ["100 Hz", "1 kHz", "10 kHz"] }
[capture]
max_time = "1 s"
target_uncertainty = "0.2 dB"
"""


def test_small_ripple_run_agrees_with_ngspice_ac_analysis(tmp_path: Path) -> None:
    """A run with every point through the transient analysis: each value within 4u of
    ngspice's AC analysis of injector + netlist (the truth deck of test_sim_netlist.py,
    ngspice as `ngspice --version` names it), pooled over three seeds (9 values: the chance
    of one beyond 4u for a normal error is under 0.06 %, JCGM 100:2008 §G.3)."""
    require_ngspice()
    version = ngspice_version()
    scenario = _scenario(tmp_path, '[device.large_signal]\nsettle = "2 ms"\n')
    board = scenario.device.board_load_current  # type: ignore[attr-defined]
    errors = []
    runs = netlist_module.CACHE.transient_runs
    for seed in (1, 2, 3):
        path = _run(SMALL_PLAN, scenario, tmp_path / f"small{seed}.h5", seed)
        e, bound_excess, _, _ = compare_with_truth(path, scenario, NETLIST, board)
        assert bound_excess.size == 0
        errors.append(e)
    assert netlist_module.CACHE.transient_runs > runs  # the points went through `tran`
    e = np.concatenate(errors)
    assert e.size == 9
    assert np.max(np.abs(e)) <= 4.0, (version, e)


# -- (c) errors -----------------------------------------------------------------------------------
LATE_FAILURE = """* solves at DC and for AC, but has no solution 10 us into a transient
.subckt LATEFAIL vin vout gnd
Rin vin gnd 1k
Rout vout gnd 1k
Bstep vout gnd V = time > 1e-5 ? V(vout) + 1 : 0.5 * V(vin)
.ends LATEFAIL
"""


def test_transient_without_convergence_names_file_subcircuit_and_point(tmp_path: Path) -> None:
    require_ngspice()
    device = _scenario(
        tmp_path, "[device.large_signal]\n", netlist_text=LATE_FAILURE, subcircuit="LATEFAIL"
    ).device
    op = OperatingPoint(5.0, 0.0)
    device.transfer(np.array([1e3]), op)  # the small-signal answer exists
    with pytest.raises(NetlistNotConverged) as caught:
        device.large_signal(1e3, np.array([0.05 + 0j]), op)  # type: ignore[attr-defined]
    message = str(caught.value)
    assert caught.value.exit_code == 1
    assert "other.cir" in message and "LATEFAIL" in message
    assert "pin DC 5 V" in message and "1000 Hz" in message and "100 mVpp" in message
    assert "transient" in message


def test_run_whose_transient_fails_exits_1_keeping_the_points_measured(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """`benchseq run` on that netlist, large-signal from 500 Hz up: the 100 Hz point is
    measured and kept, the 1 kHz point's transient fails: exit 1 naming netlist, subcircuit
    and point, no traceback, only whole points in the file."""
    require_ngspice()
    _scenario(
        tmp_path,
        '[device.large_signal]\nfrequency_from = "500 Hz"\n',
        netlist_text=LATE_FAILURE,
        subcircuit="LATEFAIL",
    )
    bench = (SCENARIOS / "netlist-ldo.bench.toml").read_text(encoding="utf-8")
    changed = bench.replace('simulation = "netlist-ldo"', 'simulation = "large.toml"')
    assert changed != bench
    (tmp_path / "late.bench.toml").write_text(changed, encoding="utf-8")
    plan = tmp_path / "plan.toml"
    plan.write_text(SMALL_PLAN.replace('min_operating = "3.5 V"', 'min_operating = "1 V"'))
    out = tmp_path / "late.h5"
    code = main(["run", str(plan), "--bench", str(tmp_path / "late.bench.toml"), "--out", str(out)])
    captured = capsys.readouterr()
    said = captured.err + captured.out
    assert code == 1
    assert "Traceback" not in said
    assert "LATEFAIL" in said and "other.cir" in said and "1000 Hz" in said
    rows = read_results(out)
    assert list(rows["frequency_planned"]) == [100.0]


@pytest.mark.parametrize(
    ("table", "key"),
    [
        ('ripple_above = "500 mV"', "device.large_signal.ripple_above"),
        ('frequency_from = "10 kHz"\nfrequency_to = "1 kHz"', "device.large_signal.frequency_from"),
        ("max_cycles = 2", "device.large_signal.max_cycles"),
        ('setle = "1 ms"', "device.large_signal.setle"),
        ("steps_per_cycle = 8", "device.large_signal.steps_per_cycle"),
    ],
)
def test_bad_large_signal_keys_name_file_and_key(tmp_path: Path, table: str, key: str) -> None:
    with pytest.raises(FileKeyError) as caught:
        _scenario(tmp_path, f"[device.large_signal]\n{table}\n")
    assert caught.value.exit_code == 2
    assert key in str(caught.value) and "large.toml" in str(caught.value)


def test_conditions_choose_the_points(tmp_path: Path) -> None:
    """ripple_above compares the pin ripple whatever its convention was written in (Vpp =
    2 Vpk, Vrms = Vpk/√2 for a sine, common practice); the frequency band and the DC ceiling
    include their ends."""
    require_ngspice()
    for written, peak in (('"500 mVpp"', 0.25), ('"0.1 Vrms"', 0.1 * math.sqrt(2.0))):
        device = _scenario(tmp_path, f"[device.large_signal]\nripple_above = {written}\n").device
        chosen = device.large_signal_settings  # type: ignore[attr-defined]
        assert math.isclose(chosen.min_ripple, peak, rel_tol=1e-12)
    settings = netlist_module.LargeSignal(
        min_ripple=0.25, frequency_from=100.0, frequency_to=1e4, pin_dc_below=4.0
    )
    assert settings.applies(1e3, 0.25, 4.0)
    assert not settings.applies(1e3, 0.2, 3.0)
    assert not settings.applies(99.0, 1.0, 3.0) and not settings.applies(1.1e4, 1.0, 3.0)
    assert not settings.applies(1e3, 1.0, 4.1)
    assert math.isinf(netlist_module.LargeSignal().frequency_to)
