"""What a result claims around its numbers, through `benchseq` itself: frequencies as planned,
one coverage rule for every ±, amplitude units that carry their convention, honest messages
(re-analysis, calibration, a bench that does not open) and input-referred rejection.

Outside references: the plan as written (frequencies, ripple, target), the simulator's truth
(benchseq.store.read_truth, solved by nodal analysis; the simulator never imports the
analysis) and the amplifier scenario's own file (sim/scenarios/amplifier.toml, its noise gain).
Coverage: U = k·u with k = 2 for about 95 % of a normal distribution (JCGM 100 (GUM) §6.2.1
and §6.3.3, clause numbers from memory); u is the standard uncertainty (GUM §2.3.1)."""

from __future__ import annotations

import json
import math
import re
import socket
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest

from benchseq.cli import main
from benchseq.report.tabular import read_report_csv
from benchseq.sim.scenario import load_scenario
from benchseq.store import read_meta, read_results, read_truth

TARGET_DB = 0.05  # small, so that some points of a short capture miss it

PLAN = f"""
title = "FV-33 claims check"
[device]
name = "FV-33 regulator evaluation board (simulated)"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = {{ at = ["100 Hz", "1 kHz", "10 kHz", "100 kHz"] }}
[capture]
max_time = "0.2 s"
target_uncertainty = "{TARGET_DB} dB"
"""

CLOSE_PLAN = """
title = "FV-33: 24 planned frequencies 0.1 % apart, short captures"
[device]
name = "FV-33 regulator evaluation board (simulated)"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = { from = "2 kHz", to = "2.046 kHz", step = "2 Hz" }
[capture]
min_cycles = 1
max_time = "2 ms"
target_uncertainty = "1 dB"
"""

AMPLIFIER_PLAN = """
title = "AB-10 amplifier board: input-referred rejection"
[device]
name = "AB-10 gain-of-10 amplifier board (simulated)"
absolute_max = "5.5 V"
min_operating = "3 V"
gain = "20 dB"
[sweep]
dc = ["5 V"]
ripple = ["200 mVpp"]
frequency = { at = ["2 kHz", "20 kHz", "200 kHz"] }
[settle]
after_operating_point = "0.5 s"
[capture]
max_time = "2 s"
target_uncertainty = "0.1 dB"
"""


@pytest.fixture(autouse=True)
def wide_terminal(monkeypatch: pytest.MonkeyPatch) -> None:
    """Tables a terminal of 240 columns would show without wrapping their headers."""
    monkeypatch.setenv("COLUMNS", "240")


def _write(folder: Path, name: str, text: str) -> Path:
    path = folder / name
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    folder = tmp_path_factory.mktemp("claims")
    plan = _write(folder, "claims.toml", PLAN)
    out = folder / "claims.h5"
    assert main(["run", str(plan), "--out", str(out), "--keep-waveforms", "--seed", "4"]) == 0
    return plan, out


def _cli(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    capsys.readouterr()
    code = main(list(args))
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _markdown(path: Path) -> str:
    """A Markdown report with its escapes (\\[, \\_, ...) taken out."""
    return re.sub(r"\\(.)", r"\1", path.read_text(encoding="utf-8"))


def _plain(text: str) -> str:
    """Terminal text with rich's table borders folded to single spaces."""
    return re.sub(r"[\s│┃┏┓┗┛━─┡┩┼╇╈┬┴┳┻╋]+", " ", text)


# -- frequencies as planned ------------------------------------------------------------------
@pytest.mark.slow
def test_close_planned_frequencies_stay_distinct_and_within_tolerance(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """24 planned frequencies 2 Hz (0.1 %) apart, captures of a few cycles: each stored
    generator frequency is within the default 0.1 % of its own planned one (plan text), no
    two coincide, and show lists the planned frequencies."""
    plan = _write(tmp_path, "close.toml", CLOSE_PLAN)
    out = tmp_path / "close.h5"
    code, _, err = _cli(capsys, "run", str(plan), "--out", str(out))
    assert code == 0, err
    frame = read_results(out).sort_values("point_id")
    planned = 2000.0 + 2.0 * np.arange(24)
    np.testing.assert_allclose(np.sort(frame["frequency_planned"]), planned, rtol=1e-12)
    moved = frame["frequency"] / frame["frequency_planned"] - 1
    assert np.all(np.abs(moved) <= 1e-3 * (1 + 1e-9)), moved.to_numpy()
    assert frame["frequency"].nunique() == 24
    assert not frame["flags"].str.contains("frequency_off_plan").any()
    code, printed, _ = _cli(capsys, "show", str(out))
    assert code == 0 and "frequency (planned)" in _plain(printed)
    assert "2.046 kHz" in printed and "2.002 kHz" in printed


# -- one coverage rule -----------------------------------------------------------------------
def test_every_plus_minus_is_k2_and_the_target_is_k1(
    run: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _, out = run
    frame = read_results(out).sort_values("point_id")
    with h5py.File(out, "r") as h5:
        attrs = h5["points/uncertainty_db"].attrs
        assert attrs["units"] == "dB (k=1)" and "k = 1" in attrs["description"]
        assert h5.attrs["coverage_factor"] == 1.0 and "U = 2u" in h5.attrs["coverage"]
    code, printed, _ = _cli(capsys, "show", str(out), "--json")
    assert code == 0 and json.loads(printed)["units"]["uncertainty_db"] == "dB (k=1)"
    # show: U = 2u, labelled k = 2
    code, printed, _ = _cli(capsys, "show", str(out))
    assert code == 0 and "± U (k = 2)" in _plain(printed)
    for u in frame["uncertainty_db"].dropna():
        assert f"{2 * u:.2f} dB" in printed
    # CSV: the header states k; the column holds u (k = 1), exactly as stored
    csv = tmp_path / "claims.csv"
    assert main(["report", str(out), "-o", str(csv)]) == 0
    header = csv.read_text(encoding="utf-8").splitlines()[0].split(",")
    assert "uncertainty_db [dB (k=1)]" in header
    back = read_report_csv(csv).sort_values("point_id")
    np.testing.assert_array_equal(back["uncertainty_db"], frame["uncertainty_db"])
    # report: U (k=2) in the table, the target stated at k = 1 and as U
    md = tmp_path / "claims.md"
    assert main(["report", str(out), "-o", str(md)]) == 0
    text = _markdown(md)
    assert "U (k=2) [dB]" in text
    assert f"u ≤ {TARGET_DB:g} dB standard (k = 1)" in text
    assert f"U ≤ {2 * TARGET_DB:g} dB expanded (k = 2" in text
    # target_unmet on that same rule: every row whose U exceeds 2 × target carries it
    table = [line for line in text.splitlines() if line.startswith("| ")]
    head = [c.strip() for c in table[0].strip("|").split("|")]
    col_u, col_flags = head.index("U (k=2) [dB]"), head.index("flags")
    over = 0
    for line in table[1:]:  # the separator row starts "|-", not "| "
        cells = [c.strip() for c in line.strip("|").split("|")]
        if cells[col_u] and float(cells[col_u]) > 2 * TARGET_DB:
            over += 1
            assert "target_unmet" in cells[col_flags], line
    assert over >= 1  # the short captures leave some points above the target
    flagged = frame["uncertainty_db"] > TARGET_DB
    assert frame.loc[flagged, "flags"].str.contains("target_unmet").all()


# -- amplitude units -------------------------------------------------------------------------
def test_amplitude_units_carry_their_convention(run: tuple[Path, Path], tmp_path: Path) -> None:
    """100 mVpp is 50 mV peak (a sine's peak-to-peak is twice its peak): the stored target is
    0.05 under a unit that says peak, so it cannot be read as 25 mVpp or 50 mVpp."""
    _, out = run
    expected = {
        "ripple_target": "V (peak)",
        "pin": "V (peak)",
        "output": "V (peak)",
        "pin_sigma": "V (peak)",
        "generator_pp": "V (pp)",
        "pin_range": "V (pp)",
        "output_noise": "V (rms)",
        "dc_level": "V",
    }
    with h5py.File(out, "r") as h5:
        for name, unit in expected.items():
            assert h5[f"points/{name}"].attrs["units"] == unit, name
    csv = tmp_path / "units.csv"
    assert main(["report", str(out), "-o", str(csv)]) == 0
    header = csv.read_text(encoding="utf-8").splitlines()[0].split(",")
    for name in ("ripple_target [V (peak)]", "generator_pp [V (pp)]", "pin_re [V (peak)]"):
        assert name in header
    back = read_report_csv(csv)
    np.testing.assert_allclose(back["ripple_target"], 0.100 / 2, rtol=1e-12)


# -- smaller untruths ------------------------------------------------------------------------
@pytest.mark.slow
def test_reanalysis_names_a_calibration_only_when_one_was_applied(
    run: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    plan, out = run
    assert read_meta(out).get("calibration") is None
    code, printed, err = _cli(
        capsys, "replay", str(out), "--reanalyse", "--out", str(tmp_path / "again.h5")
    )
    assert code == 0, err
    assert "calibration" not in printed
    # with a calibration applied, the note is there
    cal = tmp_path / "cal.h5"
    code, printed, err = _cli(capsys, "calibrate", "--plan", str(plan), "--out", str(cal))
    assert code == 0, err
    assert "probe back to the device's output" in _plain(printed)
    from benchseq.bench import embedded_bench_text

    bench = embedded_bench_text("demo").replace(
        "\n[scope]\n", '\n[scope]\ncalibration = "cal.h5"\n'
    )
    bench_path = _write(tmp_path, "bench.toml", bench)
    calibrated = tmp_path / "calibrated.h5"
    code, _, err = _cli(
        capsys,
        "run",
        str(plan),
        "--bench",
        str(bench_path),
        "--out",
        str(calibrated),
        "--keep-waveforms",
    )
    assert code == 0, err
    code, printed, err = _cli(
        capsys, "replay", str(calibrated), "--reanalyse", "--out", str(tmp_path / "cal-again.h5")
    )
    assert code == 0, err
    assert "applied a calibration; it was not re-applied" in _plain(printed)


def test_calibrate_stops_at_the_first_point_with_a_probe_on_the_output(
    run: tuple[Path, Path],
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """The output probe stays on the device's output (the simulator is told nothing): the
    channels then differ by the device's rejection at the first point (tens of dB), so the
    calibration stops after that one point, writes nothing, and says which probe to check."""
    from benchseq.sequencer import Sequencer
    from benchseq.sim.world import SimulatedBench

    plan, _ = run
    monkeypatch.setattr(SimulatedBench, "connect_probe", lambda self, channel, node: None)
    measured: list[int] = []
    original = Sequencer._measure_point

    def counted(self: Any, i: int, *args: Any, **kwargs: Any) -> Any:
        measured.append(i)
        return original(self, i, *args, **kwargs)

    monkeypatch.setattr(Sequencer, "_measure_point", counted)
    cal = tmp_path / "wrong.h5"
    code, _, err = _cli(capsys, "calibrate", "--plan", str(plan), "--out", str(cal))
    assert code == 1, err
    message = _plain(err)
    assert "first point" in message and "output channel's probe is on the supply pin" in message
    assert "Safe state" in message
    assert len(measured) == 1
    assert not cal.exists()


def test_a_bench_that_does_not_open_leaves_a_file_the_next_run_replaces(
    run: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The file of a run whose bench did not open says aborted (and why); it holds no point,
    so the same --out works for the next run without --force. A file with points is never
    replaced that way."""
    from benchseq.bench import load_bench
    from benchseq.sim.server import tcp_bench_text

    plan, _ = run
    probe = socket.socket()
    probe.bind(("127.0.0.1", 0))
    port = probe.getsockname()[1]
    probe.close()
    address = f"TCPIP::127.0.0.1::{port}::SOCKET"
    text = tcp_bench_text(
        load_bench("sim:demo").text,
        dict.fromkeys(("generator", "supply", "scope"), address),
        "demo",
    )
    text = text.replace(f'address = "{address}"', f'address = "{address}"\ntimeout = "1 s"')
    bench = _write(tmp_path, "nobody.bench.toml", text)
    target = tmp_path / "same.h5"
    code, _, err = _cli(capsys, "run", str(plan), "--bench", str(bench), "--out", str(target))
    assert code == 1, err
    meta = read_meta(target)
    assert meta["status"] == "aborted" and "could not be opened" in meta["reason"]
    assert len(read_results(target)) == 0
    code, _, err = _cli(capsys, "run", str(plan), "--out", str(target))
    assert code == 0, err
    assert read_meta(target)["status"] == "complete" and len(read_results(target)) == 4
    code, _, err = _cli(capsys, "run", str(plan), "--out", str(target))
    assert code == 2 and "already exists" in err  # a file with points is kept


# -- input-referred rejection ----------------------------------------------------------------
def test_amplifier_input_referred_rejection(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The plan declares the stage's gain, 20 dB; the scenario file's noise gain is 10
    (20·log10 10 = 20 dB). Input-referred = output-referred + 20·log10(G) (common practice for
    amplifier supply rejection). Stored, shown and reported under both names; against the
    simulator's truth referred to the input with the scenario's gain, within 4u."""
    plan = _write(tmp_path, "amp.toml", AMPLIFIER_PLAN)
    out = tmp_path / "amp.h5"
    code, _, err = _cli(capsys, "run", str(plan), "--bench", "sim:amplifier", "--out", str(out))
    assert code == 0, err
    frame = read_results(out).merge(read_truth(out), on="point_id", suffixes=("", "_true"))
    gain_db = 20 * math.log10(load_scenario("amplifier").device.noise_gain)
    assert gain_db == pytest.approx(20.0)
    detected = frame[~frame["is_bound"]]
    assert len(detected) >= 2
    np.testing.assert_allclose(
        detected["rejection_input_db"], detected["rejection_db"] + 20.0, rtol=0, atol=1e-9
    )
    truth_in = detected["rejection_db_true"] + gain_db
    error = detected["rejection_input_db"] - truth_in
    assert np.all(np.abs(error) <= 4 * detected["uncertainty_db"] + 0.05), error.to_numpy()
    code, printed, _ = _cli(capsys, "show", str(out))
    shown = _plain(printed)
    assert "rejection (input-referred)" in shown and "rejection (output-referred)" in shown
    for value in detected["rejection_input_db"]:
        assert f"{value:.2f} dB" in printed
    md = tmp_path / "amp.md"
    assert main(["report", str(out), "-o", str(md)]) == 0
    text = _markdown(md)
    assert "rejection, input-referred [dB]" in text and "rejection, output-referred [dB]" in text
    assert "input-referred rejection = output-referred + 20 dB" in text
    csv = tmp_path / "amp.csv"
    assert main(["report", str(out), "-o", str(csv)]) == 0
    assert "rejection_input_db [dB]" in csv.read_text(encoding="utf-8").splitlines()[0]
