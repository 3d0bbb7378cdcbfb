"""Scenario files and the `sim serve` entry point."""

from __future__ import annotations

import threading

import pytest

from benchseq.bench import load_bench
from benchseq.errors import BadInput, FileKeyError
from benchseq.sim.scenario import load_scenario, parse_scenario
from benchseq.sim.server import RunningServer, serve, sim_serve_main
from benchseq.sim.world import SimulatedBench


@pytest.mark.parametrize("name", ["demo", "amplifier"])
def test_shipped_scenarios_load_with_their_bench(name: str) -> None:
    sim = SimulatedBench.from_scenario(name)
    assert sim.bench.simulation == name
    assert load_bench(f"sim:{name}").name == sim.bench.name
    assert all(not rates.any for rates in sim.scenario.faults.values())


def test_demo_truth_differs_from_nominal_by_a_few_percent() -> None:
    scenario = load_scenario("demo")
    bench = load_bench("sim:demo")
    true = scenario.circuit(bench)
    assert true.coupling_capacitor / bench.injector.coupling_capacitor == pytest.approx(1.08)
    assert true.input_resistor / bench.injector.input_resistor == pytest.approx(1.0, abs=0.01)


def test_unknown_key_names_file_and_key() -> None:
    data = {"scenario": {"name": "x"}, "scope": {"ac_cornr": "10 Hz"}}
    with pytest.raises(FileKeyError, match=r"x.toml: scope.ac_cornr: unknown key"):
        parse_scenario(data, "x.toml")
    with pytest.raises(FileKeyError, match=r"faults\.printer"):
        parse_scenario({"scenario": {"name": "x"}, "faults": {"printer": {}}}, "x.toml")
    with pytest.raises(FileKeyError, match="no such simulated scenario"):
        load_scenario("nowhere")


@pytest.mark.parametrize(
    ("model", "key", "value"),
    [
        ("regulator", "error_amp_bandwidth", "0 Hz"),
        ("regulator", "second_pole", "0 Hz"),
        ("regulator", "output_capacitance", "0 F"),
        ("amplifier", "gain_bandwidth", "0 Hz"),
        ("amplifier", "rejection_pole", "0 Hz"),
    ],
)
def test_a_device_quantity_the_model_divides_by_cannot_be_zero(
    model: str, key: str, value: str
) -> None:
    """A corner frequency of 0 Hz made every transfer NaN (a/0): the simulated run then
    stored garbage as bounds, and the NaN warnings hung the command (found by the command-
    line fuzzing of scenario files, tests/perf/fuzz_inputs.py). It is refused naming the
    file and the key."""
    data = {"scenario": {"name": "x"}, "device": {"model": model, key: value}}
    with pytest.raises(FileKeyError, match=rf"x.toml: device.{key}: must be greater than zero"):
        parse_scenario(data, "x.toml")


def test_rejection_peak_of_demo_leaves_some_points_floor_limited() -> None:
    """The demo device peaks at no more than about 90 dB (so the floor shows somewhere)."""
    sim = SimulatedBench.from_scenario("demo")
    sim.handler("supply").handle("SOUR1:VOLT 5;:OUTP1 ON")
    sim.clock.sleep(1.5)  # let the bias filter settle
    best = 0.0
    for f in (10.0, 100.0, 1e3):
        sim.handler("generator").handle(f"SOUR1:FREQ {f}")
        best = max(best, sim.truth().rejection_db)
    assert 70.0 < best <= 90.0
    truth = sim.truth()
    assert truth.record()["rejection_db"] == truth.rejection_db


def test_serve_refuses_other_hosts() -> None:
    with pytest.raises(BadInput):
        serve("demo", host="0.0.0.0")


def test_sim_serve_main_stops_cleanly() -> None:
    stop = threading.Event()
    seen: list[RunningServer] = []

    def ready(server: RunningServer) -> None:
        seen.append(server)
        stop.set()

    assert sim_serve_main("demo", base_port=0, stop=stop, on_ready=ready) == 0
    assert seen and all(a.startswith("TCPIP::127.0.0.1::") for a in seen[0].addresses.values())
