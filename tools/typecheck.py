"""Run mypy over the package as it is installed.

pyproject.toml maps directories to packages (drivers/ is benchseq.drivers, sim/ is
benchseq.sim), which mypy cannot follow on its own: `mypy -p benchseq` never sees drivers/
and sim/, and `mypy drivers sim` checks them under the wrong names, so every import between
them turns into Any. This script hands mypy the three directories and gives each file its
installed module name; everything else is plain mypy (options from [tool.mypy], extra
command-line flags passed through, same output and exit status).

    .venv/bin/python tools/typecheck.py [mypy options]
"""

from __future__ import annotations

import os
import sys
import tomllib
from pathlib import Path

from mypy import main as mypy_main

ROOT = Path(__file__).resolve().parent.parent


def package_dirs() -> dict[str, Path]:
    """Package name -> directory, from [tool.setuptools] package-dir."""
    with open(ROOT / "pyproject.toml", "rb") as f:
        mapping = tomllib.load(f)["tool"]["setuptools"]["package-dir"]
    return {package: (ROOT / directory).resolve() for package, directory in mapping.items()}


def installed_name(path: str, dirs: dict[str, Path]) -> str:
    """The module name a source file has once installed."""
    file = Path(path).resolve()
    best: tuple[str, Path] | None = None
    for package, directory in dirs.items():
        if file.is_relative_to(directory) and (best is None or len(directory.parts) > len(best[1].parts)):
            best = (package, directory)
    if best is None:
        raise SystemExit(f"typecheck: {path} lies outside every package directory of pyproject.toml")
    package, directory = best
    parts = list(file.relative_to(directory).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join([package, *parts])


def main() -> None:
    os.chdir(ROOT)
    dirs = package_dirs()
    process_options = mypy_main.process_options

    def renamed(*args, **kwargs):
        sources, options = process_options(*args, **kwargs)
        for source in sources:
            if source.path is not None:
                source.module = installed_name(source.path, dirs)
        return sources, options

    mypy_main.process_options = renamed
    targets = sorted({os.path.relpath(d, ROOT) for d in dirs.values()})
    mypy_main.main(args=[*sys.argv[1:], *targets], clean_exit=True)


if __name__ == "__main__":
    main()
