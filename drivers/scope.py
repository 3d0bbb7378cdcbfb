"""The oscilloscope role: channel set-up at the probe tip, timebase, averaging, triggered
acquisition and waveform transfer as raw ADC codes with their scaling."""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from benchseq.bench import InstrumentSpec, ScopeSetup
from benchseq.drivers.blocks import decode_samples
from benchseq.drivers.errors import (
    ConnectionLost,
    GarbledReply,
    InstrumentError,
    InstrumentReportedError,
    InstrumentTimeout,
    TruncatedBlock,
)
from benchseq.drivers.instrument import (
    BACKOFF_S,
    QUERY_ATTEMPTS,
    Instrument,
    is_passing,
    parse_float,
    parse_int,
    parse_word,
)
from benchseq.drivers.profile import Profile, ScopeCapabilities
from benchseq.drivers.transport import Transport

FORMATS = {"INT8": "int8", "INT16": "int16"}
TRANSFER_RATE_FLOOR = 1e6  # bytes/s assumed at worst when scaling a waveform read's timeout
CAPTURE_TIMEOUT_FACTOR = 1.5  # *OPC? waits 1.5x the expected capture time plus the base timeout
ACQUIRE_ATTEMPTS = 2  # an acquisition met by a passing fault is started once more


@dataclass(frozen=True)
class Waveform:
    """One channel's record as the scope sent it. Volts at the probe tip:
    ((codes - code_offset) * volts_per_code + volts_at_zero) * probe."""

    codes: np.ndarray  # int ADC codes (int8 or int16 transfer)
    volts_per_code: float  # V at the scope input per code
    volts_at_zero: float  # V at the scope input at code ``code_offset``
    code_offset: float
    sample_interval: float  # s
    probe: float  # probe attenuation (10 for 10:1)
    data_format: str = "int8"

    def volts(self) -> np.ndarray:
        """Samples in V at the probe tip."""
        scale = self.volts_per_code * self.probe
        return (
            self.codes.astype(np.float64) - self.code_offset
        ) * scale + self.volts_at_zero * self.probe

    @property
    def code_min(self) -> int:
        """The lowest code of the transfer format (a sample there has clipped)."""
        return int(np.iinfo(self.codes.dtype).min)

    @property
    def code_max(self) -> int:
        return int(np.iinfo(self.codes.dtype).max)

    @property
    def duration(self) -> float:
        return len(self.codes) * self.sample_interval


class Scope(Instrument):
    """Ranges and offsets are given at the probe tip; the bench's probe factors convert."""

    role = "scope"

    def __init__(
        self,
        profile: Profile,
        transport: Transport,
        spec: InstrumentSpec,
        setup: ScopeSetup | None = None,
        *,
        sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        super().__init__(profile, transport, spec, sleep=sleep)
        if profile.capabilities is None:
            raise ValueError(f"{profile.source}: a scope profile needs [capabilities]")
        self.capabilities: ScopeCapabilities = profile.capabilities
        self.setup = setup
        self._little_endian = False  # IEEE 488.2 byte order is most significant first

    def probe(self, ch: int) -> float:
        """Probe attenuation on channel ``ch`` from the bench file (1 if not listed)."""
        if self.setup is not None:
            for channel in (self.setup.pin, self.setup.output):
                if channel.channel == ch:
                    return float(channel.probe)
        return 1.0

    def configure_channel(
        self,
        ch: int,
        range_pp: float,
        offset: float,
        coupling: str,
        bandwidth_limit: float | None = None,
    ) -> float:
        """Full-scale range (Vpp) and offset (V) at the probe tip, coupling AC/DC, optional
        bandwidth limit (Hz). Returns the range the scope chose, at the tip (Vpp)."""
        probe = self.probe(ch)
        tag = f"ch{ch}"
        self.configure("channel_on", slot=f"{tag}:on", ch=ch)
        actual = self.configure(
            "channel_range",
            range_pp / probe,
            slot=f"{tag}:range",
            query_key="channel_range_query",
            ch=ch,
        )
        self.configure(
            "channel_offset",
            offset / probe,
            slot=f"{tag}:offset",
            query_key="channel_offset_query",
            ch=ch,
        )
        self.configure(
            "channel_coupling",
            coupling.upper(),
            slot=f"{tag}:coupling",
            query_key="channel_coupling_query",
            parse=parse_word,
            ch=ch,
        )
        if bandwidth_limit is None:
            if self.profile.has("bandwidth_limit_off"):
                self.configure("bandwidth_limit_off", slot=f"{tag}:bwl", ch=ch)
        elif self.profile.has("bandwidth_limit"):
            self.configure("bandwidth_limit", float(bandwidth_limit), slot=f"{tag}:bwl_freq", ch=ch)
            if self.profile.has("bandwidth_limit_on"):
                self.configure("bandwidth_limit_on", slot=f"{tag}:bwl", ch=ch)
        return float(actual) * probe if actual is not None else range_pp

    def set_timebase(self, sample_interval: float, record_length: int) -> tuple[float, int]:
        """Ask for a sample interval (s) and record length; returns what the scope took."""
        interval = self.configure(
            "sample_interval", float(sample_interval), query_key="sample_interval_query"
        )
        length = self.configure(
            "record_length", int(record_length), query_key="record_length_query", parse=parse_int
        )
        return float(interval), int(length)

    def set_averages(self, count: int) -> None:
        """Average ``count`` triggered records (1 = none); averaged data moves in 16 bits
        when the profile offers it, or the averaging gain is lost in the transfer."""
        count = int(count)
        if not 1 <= count <= self.capabilities.max_averages:
            raise ValueError(f"averages must be 1..{self.capabilities.max_averages}, not {count}")
        if count == 1 and self.profile.has("averaging_off"):
            self.configure("averaging_off", slot="averaging")
        else:
            self.configure("averages", count, query_key="averages_query", parse=parse_int)
            if count > 1 and self.profile.has("averaging_on"):
                self.configure("averaging_on", slot="averaging")
        if count > 1 and self.profile.has("format_int16"):
            self.configure("format_int16", slot="format")
            if self.profile.has("byte_order_little"):
                self.configure("byte_order_little", slot="byte_order")
                self._little_endian = True
        else:
            self.configure("format_int8", slot="format")

    def trigger_external(self) -> None:
        self.configure("trigger_external", slot="trigger")

    def acquire(self, expected_duration_s: float) -> None:
        """Start one (averaged) acquisition and wait for it with *OPC?, the timeout scaled
        to the expected capture time (s). After a passing fault (a lost or garbled *OPC?
        reply, a lost connection, a passing error entry) the whole acquisition is started
        once more, so the records read next always come from one complete acquisition;
        a second fault is the caller's to recover."""
        command = self.cmd("acquire_single")
        timeout = self.spec.timeout_s + CAPTURE_TIMEOUT_FACTOR * max(0.0, expected_duration_s)
        for attempt in range(ACQUIRE_ATTEMPTS):
            try:
                self.transport.write(command)
                self.wait_complete(timeout)
                self.drain_errors(command)
                return
            except (InstrumentTimeout, GarbledReply, TruncatedBlock, ConnectionLost) as exc:
                if attempt == ACQUIRE_ATTEMPTS - 1:
                    raise
                self._sleep(BACKOFF_S[0])
                if isinstance(exc, ConnectionLost):
                    self.recover()
                else:
                    try:
                        self.transport.clear()
                    except InstrumentError:
                        self.recover()
            except InstrumentReportedError as exc:
                if not is_passing(exc) or attempt == ACQUIRE_ATTEMPTS - 1:
                    raise
                self.passing_errors += 1

    def read_waveform(self, ch: int) -> Waveform:
        """The last acquisition on channel ``ch``: scaling query, then the data block."""
        scaling_command = self.cmd("waveform_scaling_query", ch=ch)
        fields = self.ask_text(scaling_command).split(",")
        if len(fields) < 6:
            raise GarbledReply(
                self.resource, scaling_command, "expected 6 scaling fields", ",".join(fields)
            )
        volts_per_code = parse_float(fields[0], self.resource, scaling_command)
        volts_at_zero = parse_float(fields[1], self.resource, scaling_command)
        code_offset = parse_float(fields[2], self.resource, scaling_command)
        interval = parse_float(fields[3], self.resource, scaling_command)
        points = parse_int(fields[4], self.resource, scaling_command)
        kind = fields[5].strip().upper()
        if kind not in FORMATS:
            raise GarbledReply(self.resource, scaling_command, "unknown data format", fields[5])
        data_format = FORMATS[kind]
        command = self.cmd("waveform", ch=ch)
        item = 1 if data_format == "int8" else 2
        payload = self._ask_block(command, points * item)
        codes = decode_samples(
            payload,
            data_format,
            big_endian=not self._little_endian,
            resource=self.resource,
            command=command,
        )
        if len(codes) != points:
            raise GarbledReply(
                self.resource,
                command,
                f"block holds {len(codes)} samples, the scaling reply said {points}",
            )
        return Waveform(
            codes, volts_per_code, volts_at_zero, code_offset, interval, self.probe(ch), data_format
        )

    def _ask_block(self, command: str, expected_bytes: int) -> bytes | memoryview:
        """A block query (read-only: retried after a timeout or a bad block)."""
        saved = self.transport.timeout_s
        self.transport.timeout_s = max(
            saved, self.spec.timeout_s + expected_bytes / TRANSFER_RATE_FLOOR
        )
        last: InstrumentError | None = None
        try:
            # A transport may offer a copy-free read (the VISA transport does).
            fetch = getattr(self.transport, "query_block_view", None) or self.transport.query_block
            for attempt in range(QUERY_ATTEMPTS):
                try:
                    return fetch(command)
                except (InstrumentTimeout, GarbledReply, TruncatedBlock, ConnectionLost) as exc:
                    last = exc
                    self._sleep(BACKOFF_S[min(attempt, len(BACKOFF_S) - 1)])
                    try:
                        if isinstance(exc, ConnectionLost):
                            self.recover()
                        else:
                            self.transport.clear()
                    except InstrumentError as again:
                        last = again
        finally:
            self.transport.timeout_s = saved
        assert last is not None
        raise last
