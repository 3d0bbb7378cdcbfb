"""`--json` means stdout is one JSON document and nothing else, for every command that
offers it: the commands are found in the argument parser itself, so a command added with
`--json` and no case here fails the first test until it is given one.

Each command runs as its own `benchseq` process on the embedded simulated bench (or a
small result made here), stdout and stderr apart: json.loads(stdout) must take the whole
of stdout, and the run's progress lines must be on stderr. A refused input, too, leaves a
JSON document (the error and the exit code) on stdout."""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from benchseq.cli import build_parser, main

COMMAND_LIMIT_S = 180.0  # each process; a 3-point run takes a few seconds
PLAN = """
title = "FV-33 two-point look"
[device]
name = "FV-33 regulator evaluation board (simulated)"
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = { at = ["1 kHz", "10 kHz"] }
[capture]
max_time = "1 s"
target_uncertainty = "0.3 dB"
[mask]
name = "two-point limit"
points = [["1 kHz", "40 dB"], ["10 kHz", "20 dB"]]
"""


def json_commands(parser: argparse.ArgumentParser, prefix: tuple[str, ...] = ()) -> set[str]:
    """Every command (nested ones as 'sim serve') whose parser has a --json option."""
    found: set[str] = set()
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                path = (*prefix, name)
                if any("--json" in a.option_strings for a in sub._actions):
                    found.add(" ".join(path))
                found |= json_commands(sub, path)
    return found


class Folder:
    def __init__(self, root: Path) -> None:
        self.root = root
        self.plan = root / "plan.toml"
        self.plan.write_text(PLAN, encoding="utf-8")
        self.result = root / "run.h5"


# argv after `benchseq` for each command, run in the folder; "run" goes first and makes
# the result the others read
RECIPES: dict[str, Callable[[Folder], list[str]]] = {
    "run": lambda f: ["run", str(f.plan), "--out", str(f.result)],
    "check": lambda f: ["check", str(f.plan)],
    "injector": lambda f: ["injector", "--ripple", "100mVpp"],
    "show": lambda f: ["show", str(f.result)],
    "replay": lambda f: ["replay", str(f.result), "--out", str(f.root / "replayed.h5")],
    "calibrate": lambda f: ["calibrate", "--plan", str(f.plan), "--out", str(f.root / "cal.h5")],
    "report": lambda f: ["report", str(f.result), "-o", str(f.root / "report.md")],
    "compare": lambda f: ["compare", str(f.result), str(f.root / "replayed.h5")],
    # pyvisa-sim's own resources: no network, a bounded wait per resource
    "scan": lambda f: ["scan", "--visa-library", "@sim", "--timeout", "0.5"],
    "catalog build": lambda f: ["catalog", "build", str(f.root), "--into", str(f.root / "cat")],
    "catalog query": lambda f: ["catalog", "query", str(f.root / "cat"), "runs"],
}

# a refused input for each command (in-process: exit 2 or 1, JSON on stdout all the same)
REFUSED: dict[str, Callable[[Folder], list[str]]] = {
    "run": lambda f: ["run", str(f.root / "no-such-plan.toml")],
    "check": lambda f: ["check", str(f.root / "no-such-plan.toml")],
    "injector": lambda f: ["injector", "--ripple", "a little"],
    "show": lambda f: ["show", str(f.root / "no-such-result.h5")],
    "replay": lambda f: ["replay", str(f.root / "no-such-result.h5")],
    "calibrate": lambda f: ["calibrate", "--plan", str(f.root / "no-such-plan.toml")],
    "report": lambda f: ["report", str(f.root / "no-such-result.h5")],
    "compare": lambda f: ["compare", str(f.result), str(f.root / "no-such-result.h5")],
    "scan": lambda f: ["scan", "not an address"],
    "catalog build": lambda f: ["catalog", "build", str(f.root / "absent"), "--into", "cat"],
    "catalog query": lambda f: ["catalog", "query", str(f.root / "no-such-catalog"), "runs"],
}


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Folder]:
    yield Folder(tmp_path_factory.mktemp("json"))


def _benchseq(folder: Folder, argv: list[str]) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "benchseq", *argv, "--json"],
        capture_output=True, text=True, cwd=folder.root, timeout=COMMAND_LIMIT_S,
        env={**os.environ, "COLUMNS": "200"},
    )  # fmt: skip


def test_every_json_command_has_a_case() -> None:
    found = json_commands(build_parser())
    assert {"run", "check", "show"} <= found  # the walk itself finds commands
    assert found == set(RECIPES), "give each --json command a case in RECIPES and REFUSED"
    assert found == set(REFUSED)


@pytest.mark.parametrize("command", list(RECIPES))
def test_stdout_is_the_json_alone(command: str, folder: Folder) -> None:
    if command != "run" and not folder.result.exists():
        assert _benchseq(folder, RECIPES["run"](folder)).returncode == 0
    if command == "compare" and not (folder.root / "replayed.h5").exists():
        assert _benchseq(folder, RECIPES["replay"](folder)).returncode == 0
    if command == "catalog query" and not (folder.root / "cat").exists():
        assert _benchseq(folder, RECIPES["catalog build"](folder)).returncode == 0
    done = _benchseq(folder, RECIPES[command](folder))
    assert "Traceback" not in done.stderr, done.stderr
    assert done.returncode == 0, done.stderr
    data = json.loads(done.stdout)  # the whole of stdout, nothing before or after
    assert isinstance(data, (dict, list)) and data
    if command in ("run", "replay", "calibrate"):  # the progress went to stderr
        assert "point 2/" in done.stderr and "point 2/" not in done.stdout
    if command == "run":
        assert data["status"] == "complete" and data["measured"] == 2
        assert data["verdict"] == "pass"  # 1 kHz ~65 dB, 10 kHz ~46 dB on the demo device


@pytest.mark.parametrize("command", list(REFUSED))
def test_a_refused_input_still_gives_json(
    command: str, folder: Folder, capsys: pytest.CaptureFixture[str]
) -> None:
    code = main([*REFUSED[command](folder), "--json"])
    out, err = capsys.readouterr()
    assert code in (1, 2) and "Traceback" not in err
    data = json.loads(out)
    assert data["exit_code"] == code and data["error"]
    assert data["error"].split()[0] in err  # the same message, on stderr as always
