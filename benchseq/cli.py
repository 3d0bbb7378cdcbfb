"""The `benchseq` command (placeholder until the commands land)."""

from __future__ import annotations


def main(argv: list[str] | None = None) -> int:
    return 0
