"""Error classes a bench engineer can act on.

Every expected failure is one of these; the CLI turns them into a message and an
exit code (BadInput -> 2, anything else here -> 1) and never shows a traceback.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable


class BenchseqError(Exception):
    """Base of all expected failures. ``exit_code`` is what the CLI returns."""

    exit_code = 1


class BadInput(BenchseqError):
    """A plan, bench or results file (or a command-line value) is not acceptable."""

    exit_code = 2


class FileKeyError(BadInput):
    """A problem at one key of one file: names the file, the key path and what was expected."""

    def __init__(self, source: str, key: str, problem: str) -> None:
        self.source = source
        self.key = key
        self.problem = problem
        where = f"{source}: {key}" if key else source
        super().__init__(f"{where}: {problem}")


class MeasurementFailure(BenchseqError):
    """The run could not measure (instrument fault, bench out of limits)."""

    exit_code = 1


def nearest(name: str, candidates: Iterable[str]) -> str | None:
    """The closest valid name to a misspelt one, or None if nothing is close."""
    found = difflib.get_close_matches(name, list(candidates), n=1, cutoff=0.6)
    return found[0] if found else None


def unknown_key_message(name: str, candidates: Iterable[str]) -> str:
    """'unknown key "x"; did you mean "y"?' or a list of the valid keys."""
    options = sorted(candidates)
    guess = nearest(name, options)
    if guess is not None:
        return f'unknown key "{name}"; did you mean "{guess}"?'
    return f'unknown key "{name}"; valid keys here: {", ".join(options)}'
