"""Command-line inputs outside the plan and bench files: `injector --plot`, `scan` addresses,
the injector table's phase, and a user's own scenario file named by a bench file."""

from __future__ import annotations

import contextlib
import json
import re
import socket
import threading
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from scipy import signal

from benchseq.bench import load_bench
from benchseq.check import injector_report
from benchseq.cli import main
from benchseq.injector import InjectorModel
from benchseq.results import read_meta, read_results, read_truth

ROOT = Path(__file__).resolve().parent.parent
PLANS = ROOT / "plans"
SCENARIOS = ROOT / "sim" / "scenarios"
DEMO_FREQUENCIES = 'frequency = { from = "10 Hz", to = "1 MHz", per_decade = 3 }'


def _cli(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    return code, out, re.sub(r"\s+", " ", err)


# -- injector --plot -------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("target", "words"),
    [
        ("x.h5", "ending in .png"),
        ("missing-folder/p.png", "does not exist"),
        (".", "is a folder"),
    ],
)
def test_plot_target_refused_before_anything_is_written(
    target: str,
    words: str,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.chdir(tmp_path)
    code, _, err = _cli(capsys, "injector", "--plot", target)
    assert code == 2 and f"--plot {target}" in err and words in err
    assert list(tmp_path.iterdir()) == []  # nothing written, not even "<folder>.png"


def test_plot_written_at_exactly_the_given_name(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    png = tmp_path / "Bode.PNG"
    code, _, _ = _cli(capsys, "injector", "--plot", str(png))
    assert code == 0 and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert [p.name for p in tmp_path.iterdir()] == ["Bode.PNG"]


# -- result paths that are folders -------------------------------------------------------------
@pytest.mark.parametrize("folder", ["run.h5", "run.h5.journal"])
def test_a_result_or_journal_path_that_is_a_folder_is_refused(
    folder: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    (tmp_path / folder).mkdir()
    plan = _one_point_plan(tmp_path)
    code, _, err = _cli(capsys, "run", str(plan), "--out", str(tmp_path / "run.h5"), "--force")
    assert code == 2 and f"{tmp_path / folder} is a folder" in err
    assert (tmp_path / folder).is_dir() and not any((tmp_path / folder).iterdir())


# -- the injector table's phase ----------------------------------------------------------------
def test_table_phase_is_continuous_like_the_plot() -> None:
    """The table's phase is the angle unwrapped upwards from 1 Hz, as the plot draws it.
    Reference: the same network evaluated by scipy.signal.freqs on its rational form, then
    numpy.unwrap over a dense grid; each row must match that curve (not the wrapped angle)."""
    bench = load_bench(None)
    rows = injector_report(bench).rows
    model = InjectorModel(bench.injector, bench.generator, bench.pin)
    num, den = model.transfer_polynomials()["ac"]
    grid = np.logspace(0, 7, 7001)
    _, response = signal.freqs(num, den, worN=2 * np.pi * grid)
    curve = np.degrees(np.unwrap(np.angle(response)))
    for row in rows:
        expected = float(np.interp(np.log10(row.frequency), np.log10(grid), curve))
        assert row.phase_deg == pytest.approx(expected, abs=0.5), row.frequency
    wrapped_somewhere = any(abs(r.phase_deg) > 180 for r in rows)
    assert wrapped_somewhere  # the demo's phase passes -180° in the table's span


# -- scan addresses ------------------------------------------------------------------------
@pytest.fixture
def idn_server() -> Iterator[int]:
    """A raw SCPI socket on 127.0.0.1 answering *IDN? once per connection (bounded)."""
    server = socket.create_server(("127.0.0.1", 0))
    server.settimeout(10.0)
    port = server.getsockname()[1]

    def serve() -> None:
        for _ in range(4):
            try:
                conn, _ = server.accept()
            except OSError:
                return
            with conn:
                conn.settimeout(5.0)
                data = b""
                while not data.endswith(b"\n"):
                    try:
                        chunk = conn.recv(64)
                    except OSError:
                        break
                    if not chunk:
                        break
                    data += chunk
                if data.strip() == b"*IDN?":
                    conn.sendall(b"Fernhollow,RJ-7 test socket,0,1.0\n")

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    yield port
    with contextlib.suppress(OSError):  # wakes the accept() the thread is blocked in
        server.shutdown(socket.SHUT_RDWR)
    server.close()
    thread.join(10.0)


def test_scan_host_port_is_a_raw_socket(
    idn_server: int, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("COLUMNS", "400")
    code, out, _ = _cli(capsys, "scan", f"127.0.0.1:{idn_server}", "--json", "--timeout", "5")
    assert code == 0
    entry = next(e for e in json.loads(out) if "127.0.0.1" in e["resource"])
    assert entry["resource"] == f"TCPIP::127.0.0.1::{idn_server}::SOCKET"
    assert entry["identity"] == "Fernhollow,RJ-7 test socket,0,1.0"


@pytest.mark.parametrize("address", ["foo", "TCPIP::192.0.2.1::0::SOCKET", "TCPIP::::INSTR"])
def test_scan_refuses_what_is_not_a_resource_name(
    address: str, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, err = _cli(capsys, "scan", address)
    assert code == 2 and f"scan {address}" in err
    assert "write_termination" not in out + err


# -- a user's own scenario file --------------------------------------------------------------
def _one_point_plan(folder: Path) -> Path:
    text = (PLANS / "demo.toml").read_text(encoding="utf-8")
    plan = folder / "plan.toml"
    plan.write_text(text.replace(DEMO_FREQUENCIES, 'frequency = ["100 Hz"]'), encoding="utf-8")
    return plan


def test_bench_names_a_scenario_file_relative_to_itself(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """A user's device (the demo regulator with 20 dB less loop gain) in their own file: the
    run simulates THAT device. A regulator's low-frequency rejection follows its loop gain
    (common practice), so the true rejection at 100 Hz drops well below the shipped one's."""
    models, benches, elsewhere = tmp_path / "models", tmp_path / "benches", tmp_path / "cwd"
    for folder in (models, benches, elsewhere):
        folder.mkdir()
    scenario = (SCENARIOS / "demo.toml").read_text(encoding="utf-8")
    assert 'loop_gain = "80 dB"' in scenario
    mine = models / "weaker.toml"
    mine.write_text(scenario.replace('loop_gain = "80 dB"', 'loop_gain = "60 dB"'), "utf-8")
    bench_text = (SCENARIOS / "demo.bench.toml").read_text(encoding="utf-8")
    bench = benches / "bench.toml"
    bench.write_text(
        bench_text.replace('simulation = "demo"', 'simulation = "../models/weaker.toml"'), "utf-8"
    )
    plan = _one_point_plan(tmp_path)
    monkeypatch.chdir(elsewhere)  # relative to the bench file, not to the working folder
    assert _cli(capsys, "check", str(plan), "--bench", str(bench))[0] == 0
    code, _, err = _cli(capsys, "run", str(plan), "--bench", str(bench), "--out", "mine.h5")
    assert code == 0, err
    code, _, err = _cli(capsys, "run", str(plan), "--out", "shipped.h5")
    assert code == 0, err
    assert read_meta("mine.h5")["simulation"] == str(mine.absolute())
    weaker = float(read_truth("mine.h5")["rejection_db"].iloc[0])
    shipped = float(read_truth("shipped.h5")["rejection_db"].iloc[0])
    assert shipped - weaker > 10.0
    measured = read_results("mine.h5")
    assert len(measured) == 1


def test_a_bad_scenario_file_is_refused_naming_both_files(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    scenario = (SCENARIOS / "demo.toml").read_text(encoding="utf-8")
    mine = tmp_path / "mine.toml"
    mine.write_text(scenario.replace("[noise]", "[noise]\nhum = 1"), encoding="utf-8")
    bench_text = (SCENARIOS / "demo.bench.toml").read_text(encoding="utf-8")
    bench = tmp_path / "bench.toml"
    bench.write_text(bench_text.replace('simulation = "demo"', 'simulation = "mine.toml"'), "utf-8")
    code, _, err = _cli(capsys, "check", str(_one_point_plan(tmp_path)), "--bench", str(bench))
    assert code == 2
    assert f"{bench}: lab.simulation" in err and f"{mine}: noise.hum" in err


def test_a_run_on_a_scenario_file_resumes_from_another_folder(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """Stopped after its first point, then resumed from elsewhere: the stored run's scenario
    file is found again (the bench text's relative path is not read from the new folder)."""
    from benchseq.runner import start_run
    from benchseq.stopping import StopControl

    (tmp_path / "benches").mkdir()
    (tmp_path / "cwd").mkdir()
    mine = tmp_path / "benches" / "device.toml"
    mine.write_text((SCENARIOS / "demo.toml").read_text(encoding="utf-8"), "utf-8")
    bench_text = (SCENARIOS / "demo.bench.toml").read_text(encoding="utf-8")
    bench = tmp_path / "benches" / "bench.toml"
    bench.write_text(
        bench_text.replace('simulation = "demo"', 'simulation = "device.toml"'), "utf-8"
    )
    text = (PLANS / "demo.toml").read_text(encoding="utf-8")
    plan = tmp_path / "plan.toml"
    plan.write_text(text.replace(DEMO_FREQUENCIES, 'frequency = ["1 kHz", "10 kHz"]'), "utf-8")
    stop = StopControl()

    def emit(event: object) -> None:
        if getattr(event, "kind", "") == "point_stored":
            stop.request("test stop")

    outcome, path = start_run(
        str(plan), str(bench), str(tmp_path / "part.h5"), emit=emit, stop=stop
    )
    assert outcome.status == "stopped"
    monkeypatch.chdir(tmp_path / "cwd")
    code, _, err = _cli(capsys, "run", "--resume", str(path))
    assert code == 0, err
    assert len(read_results(path)) == 2
    assert read_meta(path)["simulation"] == str(mine)


def test_a_warning_met_by_a_command_is_passed_on_once(monkeypatch: pytest.MonkeyPatch) -> None:
    """A command records the result store's notices and passes every other warning on when
    it ends. Passed on while the recording still ran, each warning was recorded again
    behind the loop passing them on, which never ended: a run whose simulated device gave
    NaN warnings stored every point, then grew in memory until the kernel killed it. The
    passing on is counted (bounded at 10) so the old fault fails instead of hanging."""
    import warnings

    from benchseq import cli

    calls: list[object] = []
    passed_on = warnings.warn_explicit

    def counted(*args: object, **kwargs: object) -> None:
        calls.append(args[0])
        if len(calls) > 10:
            raise RuntimeError("the same warning passed on without end")
        passed_on(*args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(warnings, "warn_explicit", counted)
    with pytest.warns(UserWarning, match="from inside the command"), cli._result_notices():
        warnings.warn("from inside the command", UserWarning, stacklevel=1)
    assert len(calls) == 1
