"""benchseq: unattended supply-ripple rejection sweeps on SCPI instruments or a simulated bench.

The Python interface (``benchseq.load_plan``, ``check_plan``, ``run``, ``resume``,
``read_results``, ``to_xarray`` …) is in ``benchseq.api``; its names are importable from here and load on
first use, so ``import benchseq`` stays light."""

from __future__ import annotations

import logging
from typing import Any

__version__ = "0.1.0"

# A library's logger: silent unless the application attaches a handler (the command line
# does; a notebook may). benchseq never configures the root logger.
logging.getLogger("benchseq").addHandler(logging.NullHandler())

_API = (
    "RunResult",
    "check_plan",
    "load_bench",
    "load_plan",
    "read_meta",
    "read_results",
    "read_truth",
    "read_waveforms",
    "resume",
    "run",
    "to_xarray",
)

__all__ = ["__version__", *_API]


def __getattr__(name: str) -> Any:
    if name in _API:
        from benchseq import api

        return getattr(api, name)
    raise AttributeError(f"module 'benchseq' has no attribute {name!r}")
