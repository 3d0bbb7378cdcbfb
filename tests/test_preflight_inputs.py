"""Bad plan and bench files are refused before anything is switched on or written.

Each case is one kind of mistake. `check` must exit 2 with a message naming the file and
the key; `run` must exit 2 as well, without creating a result file (or its journal) and
without opening the bench. The ranges themselves are the project's choice (DEVELOPERS.md,
"Files people write"); the address cases follow the VISA resource-name grammar (IVI
Foundation VPP-4.3, "The VISA Library", section on resource names).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import pytest
from fakebench import Keeper

from benchseq.cli import main

ROOT = Path(__file__).resolve().parent.parent
PLANS = ROOT / "plans"
SIM_BENCH = ROOT / "sim" / "scenarios" / "demo.bench.toml"
TEMPLATE = PLANS / "bench-template.toml"
DEMO_FREQUENCIES = 'frequency = { from = "10 Hz", to = "1 MHz", per_decade = 3 }'


@dataclass(frozen=True)
class Case:
    """One bad input: which file is changed (plan, sim bench or the lab template), how,
    which file the message must name, and the key path it must name."""

    name: str
    target: str  # "plan" | "bench" | "lab"
    old: str
    new: str
    names: str  # "plan" | "bench" | "other": the file named in the message
    key: str


CASES = [
    Case("settle wait of years", "plan", 'wait = "0 s"', 'wait = "1e9 s"', "plan", "settle.wait"),
    Case("capture time too long", "plan", 'max_time = "5 s"', "max_time = 1e308", "plan", "capture.max_time"),
    Case("frequency beyond any bench", "plan", DEMO_FREQUENCIES, 'frequency = ["1 kHz", "1e12 Hz"]', "plan", "sweep.frequency[1]"),
    Case("NUL character in the title", "plan", 'title = "Demo: FV-33', 'title = "Demo\\u0000: FV-33', "plan", "title"),
    Case("ramp that never ends", "bench", 'ramp_rate = "5 V/s"', 'ramp_rate = "1e-12 V/s"', "bench", "supply.ramp_rate"),
    Case("gain-bandwidth in millihertz", "bench", 'gain_bandwidth = "10 MHz"', 'gain_bandwidth = "10 mHz"', "bench", "injector.opamp.gain_bandwidth"),
    Case("resistor of 1e300 ohm", "bench", 'input_resistor = "1 k"', 'input_resistor = "1e300 ohm"', "bench", "injector.input_resistor"),
    Case("timeout of years", "bench", 'profile = "scpi-generator"', 'profile = "scpi-generator"\ntimeout = "1e9 s"', "bench", "generator.timeout"),
    Case("negative bandwidth limit", "bench", 'bandwidth_limit = "20 MHz"', 'bandwidth_limit = "-5 Hz"', "bench", "scope.bandwidth_limit"),
    Case("settling of hours (1 F coupling capacitor)", "bench", 'coupling_capacitor = "10 uF"', 'coupling_capacitor = "1 F"', "bench", "injector"),
    Case("relative driver class", "bench", 'profile = "scpi-generator"', 'profile = "scpi-generator"\ndriver_class = "..x:Y"', "bench", "generator.driver_class"),
    Case("driver module missing", "bench", 'profile = "scpi-generator"', 'profile = "scpi-generator"\ndriver_class = "no_such_module_here:Gen"', "bench", "generator.driver_class"),
    Case("driver class of the wrong kind", "bench", 'profile = "scpi-generator"', 'profile = "scpi-generator"\ndriver_class = "benchseq.units:Amplitude"', "bench", "generator.driver_class"),
    Case("profile that does not exist", "bench", 'profile = "scpi-supply"', 'profile = "no-such-profile"', "bench", "supply.profile"),
    Case("profile file that is not TOML", "bench", 'profile = "scpi-supply"', 'profile = "broken-profile.toml"', "bench", "supply.profile"),
    Case("profile of another role", "bench", 'profile = "scpi-supply"', 'profile = "scpi-scope"', "bench", "supply.profile"),
    Case("calibration file missing", "bench", 'bandwidth_limit = "20 MHz"', 'bandwidth_limit = "20 MHz"\ncalibration = "cal/missing.h5"', "bench", "scope.calibration"),
    Case("calibration that is not one", "bench", 'bandwidth_limit = "20 MHz"', 'bandwidth_limit = "20 MHz"\ncalibration = "broken-profile.toml"', "bench", "scope.calibration"),
    Case("scenario that does not exist", "bench", 'simulation = "demo"', 'simulation = "no-such-scenario"', "bench", "lab.simulation"),
    Case("scenario file missing", "bench", 'simulation = "demo"', 'simulation = "mine/device.toml"', "bench", "lab.simulation"),
    Case("safe level above the device limit", "bench", 'safe_level = "0 V"', 'safe_level = "6.4 V"', "bench", "supply.safe_level"),
    Case("negative safe level", "bench", 'safe_level = "0 V"', 'safe_level = "-1 V"', "bench", "supply.safe_level"),
    Case("load axis without an electronic load", "plan", '# load = ["10 mA", "100 mA"]', 'load = ["10 mA", "20 mA"]', "plan", "sweep.load"),
    Case("address that is not a VISA resource", "lab", 'address = "TCPIP::192.0.2.21::5025::SOCKET"', 'address = "192.0.2.21:5025"', "bench", "generator.address"),
    Case("socket port out of range", "lab", 'address = "TCPIP::192.0.2.22::5025::SOCKET"', 'address = "TCPIP::192.0.2.22::70000::SOCKET"', "bench", "supply.address"),
]  # fmt: skip


def _write(folder: Path, case: Case) -> tuple[Path, Path]:
    """(plan, bench) in ``folder`` with the case's change made."""
    plan_text = (PLANS / "demo.toml").read_text(encoding="utf-8")
    plan_text = plan_text.replace(DEMO_FREQUENCIES, 'frequency = ["1 kHz"]')
    bench_text = (TEMPLATE if case.target == "lab" else SIM_BENCH).read_text(encoding="utf-8")
    if case.target == "plan":
        source = (
            plan_text
            if case.old != DEMO_FREQUENCIES
            else (PLANS / "demo.toml").read_text(encoding="utf-8")
        )
        assert case.old in source, case.old
        plan_text = source.replace(case.old, case.new, 1)
    else:
        assert case.old in bench_text, case.old
        bench_text = bench_text.replace(case.old, case.new, 1)
    (folder / "broken-profile.toml").write_text("[profile\nname = ", encoding="utf-8")
    plan, bench = folder / "plan.toml", folder / "bench.toml"
    plan.write_text(plan_text, encoding="utf-8")
    bench.write_text(bench_text, encoding="utf-8")
    return plan, bench


def _one_line(text: str) -> str:
    return re.sub(r"\s+", " ", text)


@pytest.fixture
def opened(monkeypatch: pytest.MonkeyPatch) -> Keeper:
    keeper = Keeper()
    monkeypatch.setattr("benchseq.drivers.session.open_session", keeper)
    monkeypatch.setenv("COLUMNS", "400")
    return keeper


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_check_refuses_naming_file_and_key(
    case: Case, tmp_path: Path, capsys: pytest.CaptureFixture[str], opened: Keeper
) -> None:
    plan, bench = _write(tmp_path, case)
    assert main(["check", str(plan), "--bench", str(bench)]) == 2
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    message = _one_line(err)
    named = str(plan) if case.names == "plan" else str(bench)
    assert f"{named}: {case.key}:" in message, message
    assert not opened.sessions


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_run_refuses_before_any_file_or_instrument(
    case: Case, tmp_path: Path, capsys: pytest.CaptureFixture[str], opened: Keeper
) -> None:
    plan, bench = _write(tmp_path, case)
    out_file = tmp_path / "results" / "run.h5"
    out_file.parent.mkdir()
    assert main(["run", str(plan), "--bench", str(bench), "--out", str(out_file)]) == 2
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    assert case.key in _one_line(err)
    assert list(out_file.parent.iterdir()) == []  # no result file, no journal, no temporary
    assert not opened.sessions  # the bench was never opened


def test_ranges_are_named_in_the_message(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The message gives the value as written and the allowed range, in engineering units."""
    plan, bench = _write(tmp_path, CASES[0])
    assert main(["check", str(plan), "--bench", str(bench)]) == 2
    message = _one_line(capsys.readouterr().err)
    assert "'1e9 s'" in message and "0 s to 1 h" in message


def test_overvoltage_protection_above_the_device_limit_is_flagged(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """Allowed (the run can proceed) but named as a warning with both limits."""
    monkeypatch.setenv("COLUMNS", "400")
    case = Case(
        "ovp",
        "bench",
        'overvoltage_protection = "6 V"',
        'overvoltage_protection = "9 V"',
        "bench",
        "",
    )
    plan, bench = _write(tmp_path, case)
    assert main(["check", str(plan), "--bench", str(bench)]) == 0
    message = _one_line(capsys.readouterr().out)
    assert "supply.overvoltage_protection 9 V is above the device's absolute maximum 6 V" in message


def test_the_shipped_files_pass_the_preflight(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(PLANS / "demo.toml")]) == 0
    assert main(["check", str(PLANS / "overnight.toml"), "--bench", str(TEMPLATE)]) in (0, 1)
    assert "error" not in capsys.readouterr().err


def test_injector_command_refuses_a_gain_bandwidth_in_millihertz(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _, bench = _write(tmp_path, next(c for c in CASES if c.name == "gain-bandwidth in millihertz"))
    assert main(["injector", "--bench", str(bench)]) == 2
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    assert f"{bench}: injector.opamp.gain_bandwidth:" in _one_line(err)


def test_values_the_model_cannot_evaluate_name_the_injector_table() -> None:
    """No resistance at all between generator and the − input (Rs = Rin = 0; Rin = 0 is
    below the allowed range, so only reachable by building the bench in code) gives an
    infinite passband gain −Rf/(Rs + Rin); the model's failure is reported against the bench
    file's [injector] table, not raised as a numerical error."""
    import dataclasses

    from benchseq.bench import load_bench
    from benchseq.check import check_plan, injector_report
    from benchseq.errors import FileKeyError
    from benchseq.plan import load_plan

    bench = load_bench(None)
    injector = dataclasses.replace(bench.injector, input_resistor=0.0)
    generator = dataclasses.replace(bench.generator, source_resistance=0.0)
    broken = dataclasses.replace(bench, injector=injector, generator=generator)
    for call in (
        lambda: check_plan(load_plan(PLANS / "demo.toml"), broken),
        lambda: injector_report(broken),
    ):
        with pytest.raises(FileKeyError) as caught:
            call()
        assert caught.value.key == "injector" and caught.value.source == "sim:demo"


def test_a_profile_capability_out_of_range_names_both_files(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], opened: Keeper
) -> None:
    """A scope profile whose re-arm time is 1e308 s would stall every capture."""
    shipped = (ROOT / "drivers" / "profiles" / "scpi-scope.toml").read_text(encoding="utf-8")
    assert "rearm_time = 0.002" in shipped
    profile = tmp_path / "slow-scope.toml"
    profile.write_text(shipped.replace("rearm_time = 0.002", "rearm_time = 1e308"), "utf-8")
    case = Case("", "bench", 'profile = "scpi-scope"', 'profile = "slow-scope.toml"', "bench", "")
    plan, bench = _write(tmp_path, case)
    assert main(["check", str(plan), "--bench", str(bench)]) == 2
    message = _one_line(capsys.readouterr().err)
    assert f"{bench}: scope.profile:" in message
    assert f"{profile}: capabilities.rearm_time:" in message
    assert not opened.sessions
