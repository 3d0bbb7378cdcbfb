"""Fault injection for the simulated instruments: seeded, per instrument, per message.

Rates are probabilities per message (0..1). ``no_reply``: a query is executed but its reply
is lost; ``garbage``: the reply is replaced by undecodable bytes; ``truncated_block``: a
block reply is cut short; ``disconnect``: the connection drops before the message is
handled; ``instrument_error``: an error is queued in SYST:ERR? after the command;
``delay_s``: every reply comes this late (a slow instrument).
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np

from benchseq.tomlfile import Section

FAULT_KINDS = ("no_reply", "garbage", "truncated_block", "disconnect", "instrument_error")


@dataclass(frozen=True)
class FaultRates:
    """Per-message fault probabilities of one instrument, and its reply delay (s)."""

    no_reply: float = 0.0
    garbage: float = 0.0
    truncated_block: float = 0.0
    disconnect: float = 0.0
    instrument_error: float = 0.0
    delay_s: float = 0.0

    def __post_init__(self) -> None:
        for item in fields(self):
            value = getattr(self, item.name)
            if item.name == "delay_s":
                if not value >= 0:
                    raise ValueError(f"delay_s must not be negative, got {value}")
            elif not 0.0 <= value <= 1.0:
                raise ValueError(f"{item.name} is a probability per message: 0..1, got {value}")

    @property
    def any(self) -> bool:
        return any(getattr(self, kind) > 0 for kind in FAULT_KINDS) or self.delay_s > 0


NO_FAULTS = FaultRates()


def rates_from_section(section: Section) -> FaultRates:
    """FaultRates from a scenario's [faults.<role>] table."""
    values = {kind: section.number(kind, default=0.0) for kind in FAULT_KINDS}
    for kind, value in values.items():
        if not 0.0 <= value <= 1.0:
            raise section.error(kind, f"a probability per message (0..1), got {value:g}")
    delay = section.quantity("delay", "s", default=0.0, nonnegative=True)
    section.done()
    return FaultRates(delay_s=delay, **values)


class FaultInjector:
    """Draws the faults of one instrument from its own seeded random stream."""

    def __init__(self, rates: FaultRates, rng: np.random.Generator) -> None:
        self.rates = rates
        self.rng = rng
        self.counts = dict.fromkeys(FAULT_KINDS, 0)
        self.messages = 0  # messages this instrument was sent (counted by the transports)

    @property
    def injected(self) -> int:
        """How many faults were injected so far (all kinds)."""
        return sum(self.counts.values())

    def fires(self, kind: str) -> bool:
        """Whether fault ``kind`` strikes this message (no draw at all when its rate is 0)."""
        rate = getattr(self.rates, kind)
        if rate <= 0:
            return False
        hit = bool(self.rng.random() < rate)
        if hit:
            self.counts[kind] += 1
        return hit

    def garbage(self) -> bytes:
        """Bytes no reply parser accepts: not ASCII, no block header, ends with the terminator."""
        body = bytes(self.rng.integers(0x80, 0x100, size=12, dtype=np.uint16).astype(np.uint8))
        return b"\xff" + body + b"\n"

    def truncate(self, reply: bytes) -> bytes:
        """A block reply cut to between 20 % and 80 % of its length (header kept)."""
        keep = int(len(reply) * self.rng.uniform(0.2, 0.8))
        return reply[: max(keep, min(len(reply) - 1, 12))]
