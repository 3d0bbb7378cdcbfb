"""Where report files go and how they are written: whole or not at all (temp file + rename),
never over a result file or its journal."""

from __future__ import annotations

import contextlib
import os
from collections.abc import Sequence
from pathlib import Path

from benchseq.errors import BadInput

RESULT_SUFFIXES = (".h5", ".hdf5", ".journal")


def default_output(first_result: str | Path, extension: str) -> Path:
    """'<folder>/<stem>-report<extension>' beside the first result file."""
    path = Path(first_result)
    return path.with_name(f"{path.stem}-report{extension}")


def check_output(out: Path, results: Sequence[str | Path]) -> None:
    """Refuse to write over a result file, its journal, or into a folder path."""
    resolved = out.resolve()
    for result in results:
        result_path = Path(result).resolve()
        if resolved in (result_path, Path(str(result_path) + ".journal")):
            raise BadInput(f"{out} is a result file given as input; choose another output name")
    if out.is_dir():
        raise BadInput(f"{out} is a folder; give a file name for the report")
    if out.suffix.lower() in RESULT_SUFFIXES and out.exists():
        raise BadInput(f"{out} looks like a result file; a report never overwrites one")


def write_atomic(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` via a temporary file in the same folder and a rename."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise BadInput(f"cannot create the folder {path.parent}: {exc.strerror or exc}") from None
    temp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with open(temp, "wb") as handle:
            handle.write(data)
        os.replace(temp, path)
    except OSError as exc:
        with contextlib.suppress(OSError):
            temp.unlink()
        raise BadInput(f"cannot write {path}: {exc.strerror or exc}") from None
