"""The byte-stream side of a simulated instrument, shared by TCP sockets and pseudo-terminals.

Messages are newline-terminated. This is also where transport faults act (drop, silence,
delay, garbage, spurious errors) and where two IEEE 488.2 conditions arise: a new message that
arrives while a query is still being answered interrupts it (-410, the reply is discarded), and a
query left without its terminator past a deadline is unterminated (-420).
"""

from __future__ import annotations

import contextlib
import os
import select
import socket
import threading
import time
from typing import Protocol

from nightbench.simulators.faults import Fault, FaultInjector

UNTERMINATED_S = 1.0  # a partial message older than this is dropped (-420 if it was a query)


class Stream(Protocol):
    def recv(self, timeout: float) -> bytes | None:
        """Bytes (b'' on timeout), or None when the peer is gone."""

    def pending(self) -> bool:
        """Whether more bytes are waiting right now."""

    def send(self, data: bytes) -> bool:
        """False when the peer is gone."""

    def close(self) -> None: ...


class SocketStream:
    def __init__(self, sock: socket.socket) -> None:
        self.sock = sock
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)

    def recv(self, timeout: float) -> bytes | None:
        ready, _, _ = select.select([self.sock], [], [], timeout)
        if not ready:
            return b""
        try:
            data = self.sock.recv(65536)
        except OSError:
            return None
        return data or None

    def pending(self) -> bool:
        return bool(select.select([self.sock], [], [], 0)[0])

    def send(self, data: bytes) -> bool:
        try:
            self.sock.sendall(data)
            return True
        except OSError:
            return False

    def close(self) -> None:
        with contextlib.suppress(OSError):
            self.sock.shutdown(socket.SHUT_RDWR)
        self.sock.close()


class PtyStream:
    """The master side of a pseudo-terminal; the simulator keeps the slave open (FIELD-NOTES 8)."""

    def __init__(self, master_fd: int) -> None:
        self.fd = master_fd

    def recv(self, timeout: float) -> bytes | None:
        ready, _, _ = select.select([self.fd], [], [], timeout)
        if not ready:
            return b""
        try:
            return os.read(self.fd, 65536)
        except OSError:
            time.sleep(timeout)  # no client attached: EIO; wait instead of spinning
            return b""

    def pending(self) -> bool:
        return bool(select.select([self.fd], [], [], 0)[0])

    def send(self, data: bytes) -> bool:
        try:
            os.write(self.fd, data)
            return True
        except OSError:
            return False

    def close(self) -> None:
        """A serial line cannot be 'dropped'; the instrument just goes quiet (see serve_stream)."""


class Instrument(Protocol):
    """What a link needs of a simulated instrument (SCPI or a plain line protocol)."""

    def execute(self, message: str) -> str | None: ...

    def push_error(self, code: int, detail: str = "") -> None: ...


class _Gone(Exception):
    """The client went away, or a drop fault hung up on it."""


class _Client:
    """One client's byte stream: cut into messages, faults applied, replies sent."""

    def __init__(
        self,
        stream: Stream,
        instrument: Instrument,
        name: str,
        faults: FaultInjector,
        lock: threading.Lock,
        can_drop: bool,
    ) -> None:
        self.stream, self.instrument, self.name = stream, instrument, name
        self.faults, self.lock, self.can_drop = faults, lock, can_drop
        self.buf = b""
        self.last_byte = time.monotonic()

    def next_message(self) -> bytes | None:
        """The next complete message, or None if none is complete yet."""
        if b"\n" in self.buf:
            raw, self.buf = self.buf.split(b"\n", 1)
            return raw
        data = self.stream.recv(0.1)
        if data is None:
            raise _Gone
        if data:
            self.buf += data
            self.last_byte = time.monotonic()
        elif self.buf and time.monotonic() - self.last_byte > UNTERMINATED_S:
            with self.lock:
                if b"?" in self.buf:
                    self.instrument.push_error(-420, "query without terminator")
                else:
                    self.instrument.push_error(-100, "message without terminator")
            self.buf = b""
        return None

    def _hang_up_if(self, dropped: bool) -> None:
        if dropped and self.can_drop:
            self.stream.close()
            raise _Gone

    def handle(self, raw: bytes) -> None:
        away = self.faults.away(self.name)
        self._hang_up_if(away == "drop")
        if away:
            return  # silent: read and ignored, as a hung instrument would
        fired = self.faults.on_message(self.name)
        kinds = {f.kind for f in fired}
        if "reboot" in kinds and hasattr(self.instrument, "power_on"):
            with self.lock:
                self.instrument.power_on()
        self._hang_up_if(bool(kinds & {"drop", "reboot"}))
        if kinds & {"drop", "silence", "reboot"}:
            return
        try:
            message = raw.decode("ascii").rstrip("\r")
        except UnicodeDecodeError:
            with self.lock:
                self.instrument.push_error(-100, "non-ASCII bytes in message")
            return
        with self.lock:
            reply = self.instrument.execute(message)
            for fault in fired:
                if fault.kind == "spurious_error":
                    self.instrument.push_error(fault.code or -221, "spurious (injected)")
        if reply is not None and (b"\n" in self.buf or self.stream.pending()):
            with self.lock:
                self.instrument.push_error(-410, "a new message arrived before the reply was sent")
            return
        self._send(reply, fired)

    def _send(self, reply: str | None, fired: list[Fault]) -> None:
        for fault in fired:
            if fault.kind == "delay":
                time.sleep(fault.delay_s)
        garbage = [f for f in fired if f.kind == "garbage"]
        if garbage:
            out: bytes | None = self.faults.garbage(garbage[0])
        else:
            out = None if reply is None else reply.encode("ascii") + b"\n"
        if out is not None and not self.stream.send(out):
            raise _Gone


def serve_stream(
    stream: Stream,
    instrument: Instrument,
    name: str,
    faults: FaultInjector,
    lock: threading.Lock,
    stop: threading.Event,
    *,
    can_drop: bool = True,
) -> None:
    """Serve one client on `stream` until it goes away, a drop fault closes it, or `stop` is set."""
    client = _Client(stream, instrument, name, faults, lock, can_drop)
    try:
        while not stop.is_set():
            raw = client.next_message()
            if raw is not None:
                client.handle(raw)
    except _Gone:
        return
