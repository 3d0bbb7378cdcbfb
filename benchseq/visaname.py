"""VISA resource strings: is an address well formed, and the HOST:PORT shorthand.

The grammar is the VISA one (IVI Foundation, VPP-4.3 "The VISA Library", resource names:
``TCPIP[board]::host::port::SOCKET``, ``TCPIP[board]::host[::device]::INSTR``,
``GPIB[board]::primary[::secondary]::INSTR``, ``USB[board]::vid::pid::serial[::intf]::INSTR``,
``ASRL...::INSTR``), checked with pyvisa's own parser so that what passes here is what
pyvisa will open. The embedded simulated bench's ``SIM::<role>`` is handled by the bench.
"""

from __future__ import annotations

import re

SOCKET_EXAMPLE = "TCPIP::192.0.2.21::5025::SOCKET"
_HOST_PORT = re.compile(
    r"^(?P<host>\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9](?:[A-Za-z0-9.-]*[A-Za-z0-9])?):(?P<port>\d{1,5})$"
)


class AddressError(ValueError):
    """An address that is not a VISA resource string; the message says what is expected."""


def expand_host_port(address: str) -> str:
    """'HOST:PORT' -> 'TCPIP::HOST::PORT::SOCKET' (a raw SCPI socket); anything else as given."""
    match = _HOST_PORT.match(address.strip())
    if match is None:
        return address
    host = match.group("host").strip("[]")
    return f"TCPIP::{host}::{int(match.group('port'))}::SOCKET"


def check_resource_name(address: str) -> str:
    """``address`` if pyvisa can parse it as a resource string (with a SOCKET port in
    1..65535), else AddressError saying what is wrong and what a good one looks like."""
    from pyvisa import rname

    text = address.strip()
    if not text:
        raise AddressError(
            f"an empty address; write a VISA resource string such as {SOCKET_EXAMPLE}"
        )
    if _HOST_PORT.match(text):
        raise AddressError(
            f"'{address}' is not a VISA resource string; for a raw socket write "
            f"{expand_host_port(text)}"
        )
    try:
        parsed = rname.parse_resource_name(text)
    except Exception as exc:  # pyvisa's InvalidResourceName and whatever its parser raises
        raise AddressError(
            f"'{address}' is not a VISA resource string ({_reason(exc)}); examples: "
            f"{SOCKET_EXAMPLE}, TCPIP::192.0.2.23::INSTR, GPIB0::5::INSTR"
        ) from None
    port = getattr(parsed, "port", None)
    if type(parsed).__name__ == "TCPIPSocket" and not (
        isinstance(port, str) and port.isdigit() and 1 <= int(port) <= 65535
    ):
        raise AddressError(f"'{address}': the socket port must be a number from 1 to 65535")
    return text


def _reason(exc: Exception) -> str:
    text = str(exc).strip()
    if text.startswith("Could not parse"):
        text = text.split(":", 1)[-1].strip() if "unknown" in text else text
    return text or type(exc).__name__
