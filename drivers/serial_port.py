"""Plain pyserial transport, for serial devices that are not VISA-friendly.

Resource strings: `serial:<port>` where <port> is a device path or any pyserial URL
(`serial:/dev/ttyUSB0`, `serial:loop://`). pyserial signals a read timeout by returning b''
(FIELD-NOTES trap 7) and leaks SerialException/OSError (trap 6): both mapped here.
"""

from __future__ import annotations

import contextlib
from typing import Any

from nightbench.drivers.errors import ConnectionLost

PREFIX = "serial:"


class SerialTransport:
    def __init__(self, resource: str, port: Any) -> None:
        self.resource = resource
        self._port = port

    @classmethod
    def open(cls, resource: str, *, timeout_s: float, baud_rate: int = 9600) -> SerialTransport:
        import serial

        url = resource[len(PREFIX) :]
        try:
            port = serial.serial_for_url(
                url, baudrate=baud_rate, timeout=timeout_s, write_timeout=timeout_s, do_not_open=True
            )
            if not url.startswith(("loop://", "socket://", "rfc2217://")):
                port.exclusive = True  # two clients on one pty would steal each other's replies
            port.open()
        except (serial.SerialException, OSError, ValueError) as exc:
            raise ConnectionLost(f"cannot open: {exc}", resource=resource) from exc
        return cls(resource, port)

    def write(self, message: str) -> None:
        import serial

        try:
            self._port.write(message.encode("ascii") + b"\n")
            self._port.flush()
        except (serial.SerialException, OSError) as exc:
            raise ConnectionLost(f"link error ({exc})", resource=self.resource, command=message) from exc

    def query(self, message: str) -> str:
        self.write(message)
        return self._read_line(message)

    def read(self) -> str:
        return self._read_line(None)

    def _read_line(self, message: str | None) -> str:
        import serial

        try:
            raw = self._port.read_until(b"\n")
        except (serial.SerialException, OSError) as exc:
            raise ConnectionLost(f"link error ({exc})", resource=self.resource, command=message) from exc
        if not raw.endswith(b"\n"):
            raise ConnectionLost(
                "no reply before the timeout (instrument silent or disconnected)",
                resource=self.resource,
                command=message,
            )
        return raw.decode("ascii", errors="replace").strip()

    def flush_input(self) -> None:
        import serial

        with contextlib.suppress(serial.SerialException, OSError):
            self._port.reset_input_buffer()

    def close(self) -> None:
        """Closing a dead link must never mask the error that made the caller close it."""
        import serial

        with contextlib.suppress(serial.SerialException, OSError):
            self._port.close()
