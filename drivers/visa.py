"""VISA transport through pyvisa (default backend `@py`, pyvisa-py).

Holds the traps measured in FIELD-NOTES: terminations must be set, opening a socket never
fails by itself, a closed peer looks like a timeout, a late reply lands on the next query, and
ASRL faults leak pyserial/OS exceptions. All of it is mapped to `ConnectionLost` here.
"""

from __future__ import annotations

import contextlib
import os
from typing import Any

from nightbench.drivers.errors import ConnectionLost, InstrumentError

_managers: dict[str, Any] = {}


def resource_manager(visa_library: str = "@py") -> Any:
    """One ResourceManager per VISA library, created on first use (pyvisa import is slow)."""
    if visa_library not in _managers:
        import pyvisa

        try:
            _managers[visa_library] = pyvisa.ResourceManager(visa_library)
        except (OSError, ValueError, pyvisa.errors.Error) as exc:
            raise InstrumentError(f"cannot load the VISA library '{visa_library}': {exc}") from exc
    return _managers[visa_library]


def _link_errors() -> tuple[type[BaseException], ...]:
    import pyvisa

    errors: list[type[BaseException]] = [pyvisa.errors.VisaIOError, pyvisa.errors.Error, OSError, EOFError]
    try:
        import serial

        errors.append(serial.SerialException)
    except ImportError:  # pragma: no cover - pyserial is a dependency
        pass
    return tuple(errors)


class VisaTransport:
    """One open pyvisa resource with terminations, a short timeout and TCP_NODELAY."""

    def __init__(self, resource: str, inst: Any) -> None:
        self.resource = resource
        self._inst = inst
        self._errors = _link_errors()

    @classmethod
    def open(
        cls, resource: str, *, timeout_s: float, visa_library: str = "@py", baud_rate: int | None = None
    ) -> VisaTransport:
        rm = resource_manager(visa_library)
        errors = _link_errors()
        try:
            inst = rm.open_resource(resource, open_timeout=int(timeout_s * 1000))
            inst.timeout = int(timeout_s * 1000)
            inst.read_termination = "\n"
            inst.write_termination = "\n"
            if resource.upper().startswith("TCPIP") and resource.upper().endswith("SOCKET"):
                set_nodelay(inst)
            if baud_rate and resource.upper().startswith("ASRL"):
                inst.baud_rate = baud_rate
        except errors as exc:
            raise ConnectionLost(f"cannot open: {exc}", resource=resource) from exc
        return cls(resource, inst)

    def write(self, message: str) -> None:
        try:
            self._inst.write(message)
        except self._errors as exc:
            raise ConnectionLost(_describe(exc), resource=self.resource, command=message) from exc

    def query(self, message: str) -> str:
        try:
            reply = self._inst.query(message)
        except UnicodeDecodeError as exc:
            raise InstrumentError("garbled reply (not text)", resource=self.resource, command=message) from exc
        except self._errors as exc:
            raise ConnectionLost(_describe(exc), resource=self.resource, command=message) from exc
        return reply.strip()

    def read(self) -> str:
        try:
            reply = self._inst.read()
        except UnicodeDecodeError as exc:
            raise InstrumentError("garbled reply (not text)", resource=self.resource) from exc
        except self._errors as exc:
            raise ConnectionLost(_describe(exc), resource=self.resource) from exc
        return reply.strip()

    def flush_input(self) -> None:
        """Discard bytes already received (a late reply). pyvisa's clear() can block for good on a
        socket whose peer has gone, so with pyvisa-py the session's own buffers are emptied."""
        try:
            session = self._inst.visalib.sessions[self._inst.session]
        except (AttributeError, KeyError):
            session = None
        except self._errors as exc:  # a resource already closed (a reconnect that failed): pyvisa's InvalidSession
            raise ConnectionLost(_describe(exc), resource=self.resource) from exc
        link = getattr(session, "interface", None)
        if session is None or link is None:
            with contextlib.suppress(*self._errors):
                self._inst.clear()
            return
        if hasattr(session, "_pending_buffer"):
            session._pending_buffer.clear()
        if hasattr(link, "reset_input_buffer"):  # pyserial port behind ASRL
            with contextlib.suppress(*self._errors):
                link.reset_input_buffer()
            return
        try:
            link.setblocking(False)
            while link.recv(65536):
                pass
        except OSError:  # BlockingIOError included: nothing more to read
            pass
        finally:
            with contextlib.suppress(OSError):
                link.setblocking(True)

    def close(self) -> None:
        """Closing a dead link must never mask the error that made the caller close it."""
        with contextlib.suppress(*self._errors):
            self._inst.close()


def set_nodelay(inst: Any, on: bool = True) -> bool:
    """TCP_NODELAY on a TCPIP SOCKET session (FIELD-NOTES trap 10); True if it could be set.
    pyvisa-py does not implement VI_ATTR_TCPIP_NODELAY, so its session's socket is set directly."""
    import socket

    try:
        link = inst.visalib.sessions[inst.session].interface
        link.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1 if on else 0)
        return True
    except (AttributeError, KeyError, OSError):
        pass
    from pyvisa import constants

    unsupported: tuple[type[BaseException], ...] = (*_link_errors(), NotImplementedError, AttributeError)
    try:
        inst.set_visa_attribute(constants.VI_ATTR_TCPIP_NODELAY, constants.VI_TRUE if on else constants.VI_FALSE)
        return True
    except unsupported:
        return False  # not every backend has it; joined messages avoid the stall anyway


def _describe(exc: BaseException) -> str:
    import pyvisa

    if isinstance(exc, pyvisa.errors.VisaIOError) and exc.error_code == pyvisa.constants.StatusCode.error_timeout:
        return "no reply before the timeout (instrument silent or disconnected)"
    if isinstance(exc, ConnectionRefusedError):
        return "connection refused (nothing is listening there)"
    if isinstance(exc, BrokenPipeError | ConnectionResetError):
        return "connection closed by the instrument"
    name = type(exc).__name__
    text = str(exc) or os.strerror(getattr(exc, "errno", 0) or 0)
    return f"link error ({name}: {text})"
