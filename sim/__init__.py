"""The simulated bench: circuit, device models, SCPI instruments and servers (benchseq.sim).

``SimulatedBench.from_scenario("demo")`` builds one in-process; ``serve("demo")`` puts it on
TCP ports of 127.0.0.1. Never imports benchseq.injector or benchseq.analysis.
"""

from __future__ import annotations

from typing import Any

__all__ = [
    "FaultRates",
    "RunningServer",
    "SimulatedBench",
    "StateChange",
    "Truth",
    "VirtualClock",
    "serve",
]

_WHERE = {
    "SimulatedBench": "benchseq.sim.world",
    "Truth": "benchseq.sim.world",
    "StateChange": "benchseq.sim.world",
    "VirtualClock": "benchseq.sim.world",
    "FaultRates": "benchseq.sim.faults",
    "RunningServer": "benchseq.sim.server",
    "serve": "benchseq.sim.server",
}


def __getattr__(name: str) -> Any:
    """Import lazily: reading a scenario file must not pull in the whole simulator."""
    if name in _WHERE:
        import importlib

        return getattr(importlib.import_module(_WHERE[name]), name)
    raise AttributeError(f"module 'benchseq.sim' has no attribute {name!r}")
