"""The command's BLAS thread setting: set only before numpy loads, never on import, and not
passed on to child processes (common practice: OpenBLAS reads OPENBLAS_NUM_THREADS once,
when the library loads)."""

from __future__ import annotations

import os
import subprocess
import sys

PROBE = """
import os, sys
{before}
import benchseq, benchseq.cli
assert "numpy" not in sys.modules or {numpy_first}
print(benchseq.cli.one_blas_thread(), os.environ.get("OPENBLAS_NUM_THREADS"),
      os.environ.get("OMP_NUM_THREADS"), "numpy" in sys.modules)
"""


def _probe(before: str = "", numpy_first: bool = False, **env: str) -> list[str]:
    clean = {
        k: v for k, v in os.environ.items() if k not in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS")
    }
    clean.update(env)
    code = PROBE.format(before=before, numpy_first=numpy_first)
    done = subprocess.run(
        [sys.executable, "-c", code], env=clean, capture_output=True, text=True, timeout=60
    )
    assert done.returncode == 0, done.stderr
    return done.stdout.split()


def test_one_thread_is_set_for_the_import_and_removed_after() -> None:
    assert _probe() == ["True", "None", "None", "True"]


def test_importing_the_package_sets_nothing_and_a_loaded_numpy_is_left_alone() -> None:
    assert _probe(before="import numpy", numpy_first=True) == ["False", "None", "None", "True"]


def test_the_users_thread_count_wins() -> None:
    assert _probe(OPENBLAS_NUM_THREADS="2") == ["False", "2", "None", "False"]
