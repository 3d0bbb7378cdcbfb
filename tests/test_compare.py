"""`benchseq compare` through the command line: runs of the demo plan on the simulated bench
(same device, different seeds; and a device with less loop gain), interpolation over log f
against numpy.interp, lower bounds kept as bounds, the plot, and bad input.

References: the combined standard uncertainty of a difference of uncorrelated inputs,
u_c² = u_a² + u_b², is JCGM 100:2008 (GUM) §5.1.2 eq. 10 with sensitivity coefficients ±1;
for a linear interpolation y = (1−w)·y0 + w·y1 the same equation gives
u² = (1−w)²·u0² + w²·u1². The share of a normal distribution beyond ±2σ, erfc(2/√2)
≈ 4.55 %, is JCGM 100:2008 §G.1.3 / Table G.1 (k = 2, about 95 %). The count of chance
exceedances is judged with the binomial distribution (scipy.stats.binom)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from report_files import row, write_result
from scipy.stats import binom

from benchseq.cli import main
from benchseq.store import read_results, read_truth

ROOT = Path(__file__).resolve().parents[1]
PLANS = ROOT / "plans"
SCENARIOS = ROOT / "sim" / "scenarios"
K = 2.0
CHANCE = math.erfc(K / math.sqrt(2.0))  # JCGM 100:2008 Table G.1: 95.45 % inside ±2σ


@pytest.fixture(autouse=True)
def wide_terminal(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("COLUMNS", "200")


def _cli(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    capsys.readouterr()
    code = main(list(args))
    captured = capsys.readouterr()
    return code, captured.out, captured.err


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """The demo plan three times: seeds 1 and 2 on the shipped device, seed 3 on the same
    regulator with its error amplifier's bandwidth tripled (a user's scenario file, as in
    tests/test_cli_inputs): the loop gain is the same at low frequencies and about three
    times (≈ 9.5 dB) higher above the new corner, so the truth differs above ~200 Hz only."""
    folder = tmp_path_factory.mktemp("compare")
    scenario = (SCENARIOS / "demo.toml").read_text(encoding="utf-8")
    assert 'error_amp_bandwidth = "200 Hz"' in scenario
    wider = scenario.replace('error_amp_bandwidth = "200 Hz"', 'error_amp_bandwidth = "600 Hz"')
    (folder / "wider.toml").write_text(wider, "utf-8")
    bench_text = (SCENARIOS / "demo.bench.toml").read_text(encoding="utf-8")
    bench = folder / "wider.bench.toml"
    bench.write_text(
        bench_text.replace('simulation = "demo"', 'simulation = "wider.toml"'), "utf-8"
    )
    plan = str(PLANS / "demo.toml")
    out = {name: folder / f"{name}.h5" for name in ("one", "two", "wider")}
    assert main(["run", plan, "--out", str(out["one"]), "--seed", "1"]) == 0
    assert main(["run", plan, "--out", str(out["two"]), "--seed", "2"]) == 0
    assert (
        main(["run", plan, "--bench", str(bench), "--out", str(out["wider"]), "--seed", "3"]) == 0
    )
    return out


def _points(printed: str) -> list[dict]:
    data = json.loads(printed)
    assert len(data["comparisons"]) == 1
    return data["comparisons"][0]["points"]


@pytest.mark.slow
def test_same_device_two_seeds_differ_no_more_than_coverage_allows(
    runs: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    code, printed, err = _cli(capsys, "compare", str(runs["one"]), str(runs["two"]), "--json")
    assert code == 0, err
    points = _points(printed)
    a = read_results(runs["one"]).set_index("point_id")
    b = read_results(runs["two"]).set_index("point_id")
    values = [p for p in points if p["kind"] == "value"]
    assert len(values) + sum(p["kind"] != "value" for p in points) == len(a)
    for p in values:  # GUM eq. 10: u_c of a difference of uncorrelated inputs
        ua = a.loc[p["ref_point_id"], "uncertainty_db"]
        ub = b.loc[p["other_point_id"], "uncertainty_db"]
        assert p["u_c_db"] == pytest.approx(math.sqrt(ua**2 + ub**2), rel=1e-12)
        d = b.loc[p["other_point_id"], "rejection_db"] - a.loc[p["ref_point_id"], "rejection_db"]
        assert p["difference_db"] == pytest.approx(d, abs=1e-12)
        assert p["significant"] == (abs(d) > K * p["u_c_db"])
    significant = sum(p["significant"] for p in values)
    allowed = binom.ppf(0.999, len(values), CHANCE)  # one false alarm in 1000 test runs
    assert significant <= allowed, (significant, allowed)
    code, printed, _ = _cli(capsys, "compare", str(runs["one"]), str(runs["two"]))
    assert code == 0
    head = printed.split("┏")[0]  # the summary comes before the table
    assert f"{len(values)} values compared" in head and "expected by chance" in head


@pytest.mark.slow
def test_a_changed_device_shows_where_the_truth_differs(
    runs: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    """The simulator's truth of both runs is the outside reference: where the true
    rejections differ by far more than U the comparison calls the point significant with
    the right sign; where they differ by less than u_c/2, significant calls stay within the
    binomial bound for a normal d offset by at most u_c/2 (P(|Z + 1/2| > k))."""
    code, printed, err = _cli(capsys, "compare", str(runs["one"]), str(runs["wider"]), "--json")
    assert code == 0, err
    truth_a = read_truth(runs["one"]).set_index("point_id")["rejection_db"]
    truth_b = read_truth(runs["wider"]).set_index("point_id")["rejection_db"]
    far = near = near_significant = 0
    for p in _points(printed):
        if p["kind"] != "value":
            continue
        true_d = truth_b[p["other_point_id"]] - truth_a[p["ref_point_id"]]
        if abs(true_d) > 3 * K * p["u_c_db"]:
            far += 1
            assert p["significant"] and np.sign(p["difference_db"]) == np.sign(true_d), p
        elif abs(true_d) < 0.5 * p["u_c_db"]:
            near += 1
            near_significant += p["significant"]
    assert far >= 8  # the mid and high band: about 6 to 11 dB apart
    assert near >= 2  # the lowest frequencies: the same loop gain
    offset = 0.5
    p_near = 0.5 * (math.erfc((K - offset) / math.sqrt(2)) + math.erfc((K + offset) / math.sqrt(2)))
    assert near_significant <= binom.ppf(0.999, near, p_near)


def _write(path: Path, freqs: np.ndarray, values: np.ndarray, u: np.ndarray, **extra) -> Path:
    rows = [
        row(i, float(f), float(v), uncertainty_db=float(s), **extra)
        for i, (f, v, s) in enumerate(zip(freqs, values, u, strict=True))
    ]
    return write_result(path, rows)


def test_interpolation_over_log_frequency_matches_numpy(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    fa = np.logspace(1, 6, 16)  # 10 Hz .. 1 MHz
    fb = np.logspace(1.7, 5.3, 9)  # 50 Hz .. 200 kHz, no frequency in common inside
    va = 80 - 8 * np.log10(fa)
    vb = 75 - 7 * np.log10(fb) + 0.5 * np.sin(np.arange(9))
    ua, ub = np.full(16, 0.1), np.linspace(0.05, 0.3, 9)
    a = _write(tmp_path / "a.h5", fa, va, ua)
    b = _write(tmp_path / "b.h5", fb, vb, ub)
    code, printed, err = _cli(capsys, "compare", str(a), str(b), "--json")
    assert code == 0, err
    points = _points(printed)
    inside = (fa >= fb[0]) & (fa <= fb[-1])
    expected = np.interp(np.log10(fa), np.log10(fb), vb)
    position = np.interp(np.log10(fa), np.log10(fb), np.arange(9.0))  # fractional index
    by_ref = {p["ref_point_id"]: p for p in points if p["ref_point_id"] >= 0}
    for i in range(16):
        p = by_ref[i]
        if not inside[i]:
            assert p["kind"] == "no partner" and p["difference_db"] is None
            continue
        assert p["interpolated"] and p["other_db"] == pytest.approx(expected[i], abs=1e-9)
        j = min(int(position[i]), 7)
        w = position[i] - j
        u_interp = math.sqrt(((1 - w) * ub[j]) ** 2 + (w * ub[j + 1]) ** 2)  # GUM eq. 10
        assert p["other_u_db"] == pytest.approx(u_interp, rel=1e-9)
        assert p["u_c_db"] == pytest.approx(math.hypot(ua[i], u_interp), rel=1e-9)
    # b's points outside a's span have no partner either; none inside is left unpaired
    data = json.loads(printed)["comparisons"][0]["counts"]
    assert data["no_partner_reference"] == int((~inside).sum())
    assert data["no_partner_other"] == 0
    code, printed, _ = _cli(capsys, "compare", str(a), str(b))
    assert code == 0 and "no partner" in printed and "interp" in printed


def test_bounds_give_only_bounds_of_the_difference(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """True rejection ≥ bound: other bound − reference value bounds d from below, other
    value − reference bound bounds it from above, two bounds say nothing."""
    f = np.array([100.0, 1e3, 1e4, 1e5])
    a = write_result(
        tmp_path / "a.h5",
        [row(0, f[0], 50.0), row(1, f[1], 50.0), row(2, f[2], math.nan, bound_db=60.0),
         row(3, f[3], math.nan, bound_db=60.0)],
    )  # fmt: skip
    b = write_result(
        tmp_path / "b.h5",
        [row(0, f[0], math.nan, bound_db=60.0), row(1, f[1], math.nan, bound_db=45.0),
         row(2, f[2], 50.0), row(3, f[3], math.nan, bound_db=70.0)],
    )  # fmt: skip
    code, printed, err = _cli(capsys, "compare", str(a), str(b), "--json")
    assert code == 0, err
    p = {q["ref_point_id"]: q for q in _points(printed)}
    assert p[0]["kind"] == "lower bound" and p[0]["significant"]  # d ≥ +10 dB, U = 0.2 dB
    assert p[0]["reading"] == "other higher"
    assert p[1]["kind"] == "lower bound" and not p[1]["significant"]  # d ≥ −5: nothing known
    assert p[1]["reading"] == "undetermined"
    assert p[2]["kind"] == "upper bound" and p[2]["significant"]  # d ≤ −10 dB
    assert p[2]["reading"] == "other lower"
    assert p[3]["kind"] == "undetermined" and not p[3]["significant"]
    code, printed, _ = _cli(capsys, "compare", str(a), str(b))
    assert code == 0 and "≥ +10.00" in printed and "≤ -10.00" in printed
    assert "themselves only bounds" in printed


@pytest.mark.slow
def test_plot_and_bad_input(
    runs: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    png = tmp_path / "diff.png"
    code, printed, err = _cli(
        capsys,
        "compare",
        str(runs["one"]),
        str(runs["two"]),
        str(runs["wider"]),
        "--plot",
        str(png),
    )
    assert code == 0, err
    second = tmp_path / "diff-2.png"
    for path in (png, second):
        assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and path.stat().st_size > 10_000
    assert printed.count("against one.h5") == 2
    for args, what in (
        ([str(runs["one"])], "two result files"),
        ([str(runs["one"]), str(tmp_path / "nowhere.h5")], "nowhere.h5"),
        ([str(runs["one"]), str(runs["one"])], "given twice"),
        ([str(runs["one"]), str(runs["two"]), "--plot", str(tmp_path / "x.svg")], ".png"),
        ([str(runs["one"]), str(runs["two"]), "--subcircuit", "X"], "--model"),
    ):
        code, out, err = _cli(capsys, "compare", *args)
        assert code == 2, (args, out, err)
        assert what in err and "Traceback" not in err


NETLIST_PLAN = """
title = "FERN_LDO33 four points"
[device]
name = "FERN_LDO33 regulator (netlist model, 3.3 V out)"
absolute_max = "6 V"
min_operating = "3.5 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = { at = ["100 Hz", "1 kHz", "10 kHz", "100 kHz"] }
[capture]
max_time = "2 s"
target_uncertainty = "0.2 dB"
"""


def test_a_run_on_the_netlist_device_agrees_with_the_netlist(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The simulated bench with the netlist device, compared with ngspice's prediction of
    the same subcircuit (the scenario's 20 mA board load): differences within coverage."""
    plan = tmp_path / "four.toml"
    plan.write_text(NETLIST_PLAN, encoding="utf-8")
    out = tmp_path / "four.h5"
    code, _, err = _cli(capsys, "run", str(plan), "--bench", "sim:netlist-ldo", "--out", str(out))
    assert code == 0, err
    netlist = SCENARIOS / "fern-ldo.cir"
    args = ["--model", str(netlist), "--subcircuit", "FERN_LDO33", "--model-load", "20 mA"]
    code, printed, err = _cli(capsys, "compare", str(out), *args, "--json")
    assert code == 0, err
    data = json.loads(printed)["comparisons"][0]
    assert data["other"]["model"] is True
    values = [p for p in data["points"] if p["kind"] == "value"]
    assert len(values) == 4
    significant = sum(p["significant"] for p in values)
    assert significant <= binom.ppf(0.999, len(values), CHANCE)
    code, printed, _ = _cli(capsys, "compare", str(out), *args)
    assert code == 0 and "taken as exact (u = 0)" in printed
