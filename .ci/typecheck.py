"""Run mypy over the package as it is installed.

pyproject.toml maps directories to packages (drivers/ is benchseq.drivers, sim/ is
benchseq.sim), which mypy cannot follow on its own: `mypy -p benchseq` never sees drivers/
and sim/, and `mypy drivers sim` checks them under the wrong names, so every import between
them turns into Any. This script hands mypy the three directories and gives each file its
installed module name; everything else is plain mypy (options from [tool.mypy], extra
command-line flags passed through, same messages; exit 1 on errors, 2 on a blocking one).

    .venv/bin/python .ci/typecheck.py [mypy options]
"""

from __future__ import annotations

import os
import sys
import tomllib
from pathlib import Path

from mypy import build
from mypy.errors import CompileError
from mypy.fscache import FileSystemCache
from mypy.main import process_options

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
        if file.is_relative_to(directory) and (
            best is None or len(directory.parts) > len(best[1].parts)
        ):
            best = (package, directory)
    if best is None:
        raise SystemExit(
            f"typecheck: {path} lies outside every package directory of pyproject.toml"
        )
    package, directory = best
    parts = list(file.relative_to(directory).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join([package, *parts])


def main() -> int:
    os.chdir(ROOT)
    dirs = package_dirs()
    targets = sorted({os.path.relpath(d, ROOT) for d in dirs.values()})
    fscache = FileSystemCache()
    sources, options = process_options([*sys.argv[1:], *targets], fscache=fscache)
    for source in sources:
        if source.path is not None:
            source.module = installed_name(source.path, dirs)
    errors = 0
    files: set[str] = set()

    def show(filename: str | None, messages: list[str], serious: bool) -> None:
        nonlocal errors
        for message in messages:
            print(message, file=sys.stderr if serious else sys.stdout)
            if ": error:" in message:
                errors += 1
                files.add(message.split(":", 1)[0])

    try:
        build.build(sources, options, flush_errors=show, fscache=fscache)
    except CompileError as exc:  # a blocking error (syntax, duplicate module): shown above
        for message in exc.messages:
            print(message, file=sys.stderr)
        return 2
    if errors:
        print(
            f"Found {errors} error{'s' * (errors != 1)} in {len(files)} file"
            f"{'s' * (len(files) != 1)} (checked {len(sources)} source files)"
        )
        return 1
    print(f"Success: no issues found in {len(sources)} source files")
    return 0


if __name__ == "__main__":
    sys.exit(main())
