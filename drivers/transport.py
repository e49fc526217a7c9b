"""The tiny transport interface and the one place that picks an implementation by resource string:
VISA strings (TCPIP, ASRL, GPIB, USB) go to pyvisa; `serial:<port>` goes to plain pyserial.

The rest of nightbench talks to `Transport` only. Which class serves a resource string is
decided here, so pointing a plan at a simulator or a real instrument changes only a string.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol


class Transport(Protocol):
    """A message-based link to one instrument: text out, one line of text back."""

    resource: str

    def write(self, message: str) -> None: ...

    def query(self, message: str) -> str: ...

    def read(self) -> str:
        """The next line received: the reply to an earlier `write` (a query split in two, so the
        caller can work while the instrument does)."""
        ...

    def flush_input(self) -> None:
        """Throw away anything already received (a late reply after a timeout)."""

    def close(self) -> None: ...


@dataclass(frozen=True)
class Link:
    """How to reach an instrument; `open()` makes a new transport each time (a reconnect needs a
    NEW one: reopening the same pyvisa object resets its settings, FIELD-NOTES trap 5)."""

    resource: str
    timeout_s: float = 2.0
    visa_library: str = "@py"
    baud_rate: int | None = None

    def open(self) -> Transport:
        return open_transport(
            self.resource, timeout_s=self.timeout_s, visa_library=self.visa_library, baud_rate=self.baud_rate
        )


VISA_PREFIXES = ("TCPIP", "ASRL", "GPIB", "USB")


def check_resource(resource: str) -> str | None:
    """Why `resource` cannot be a resource string, or None if it looks usable.

    Checked at plan time without opening anything, so a typo fails `check`, not the night.
    """
    from pyvisa import rname

    from nightbench.drivers.serial_port import PREFIX as SERIAL

    text = resource.strip()
    if not text:
        return "the resource string is empty"
    if text.startswith(SERIAL):
        return None if len(text) > len(SERIAL) else "'serial:' needs a port, e.g. serial:/dev/ttyUSB0"
    if not text.upper().startswith(VISA_PREFIXES):
        return (
            f"'{resource}' is not a resource string "
            "(expected e.g. TCPIP::127.0.0.1::5025::SOCKET, ASRL/dev/ttyUSB0::INSTR or serial:/dev/ttyUSB0)"
        )
    try:
        parsed = rname.parse_resource_name(text)
    except rname.InvalidResourceName as exc:
        return f"'{resource}' is not a valid VISA resource string ({exc})"
    port = getattr(parsed, "port", None)
    if port is not None and not (port.isdigit() and 0 < int(port) < 65536):
        return f"'{resource}' names port {port}, which is not a TCP port (1-65535)"
    return None


def open_transport(
    resource: str, *, timeout_s: float = 2.0, visa_library: str = "@py", baud_rate: int | None = None
) -> Transport:
    """Open the transport that serves `resource` and return it, opened (not yet proven alive)."""
    from nightbench.drivers.serial_port import PREFIX as SERIAL

    if resource.startswith(SERIAL):
        from nightbench.drivers.serial_port import SerialTransport

        return SerialTransport.open(resource, timeout_s=timeout_s, baud_rate=baud_rate or 9600)
    from nightbench.drivers.visa import VisaTransport

    return VisaTransport.open(resource, timeout_s=timeout_s, visa_library=visa_library, baud_rate=baud_rate)
