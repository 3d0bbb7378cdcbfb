"""Print the oldest versions pyproject.toml allows (each `>=X` as `==X`), one per line.

Used by .ci/run to test the declared lower bounds: the package's runtime dependencies and the
test extra's libraries (not the linters, which only read the code).
"""

from __future__ import annotations

import re
import sys
import tomllib
from pathlib import Path

TOOLS = {"ruff", "mypy"}  # read the code; their versions do not change what the tests check

project = tomllib.loads((Path(__file__).parents[1] / "pyproject.toml").read_text())["project"]
wanted = [*project["dependencies"], *project["optional-dependencies"]["test"]]
for requirement in wanted:
    match = re.fullmatch(r"\s*([A-Za-z0-9_.\-]+)\s*>=\s*([0-9][0-9A-Za-z.]*)\s*", requirement)
    if match is None:
        sys.exit(f"pyproject.toml: {requirement!r} has no plain lower bound (name>=version)")
    name, version = match.groups()
    if name.lower() not in TOOLS:
        print(f"{name}=={version}")
