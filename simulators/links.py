"""The byte-stream side of a simulated instrument, shared by TCP sockets and pseudo-terminals.

Messages are newline-terminated. This is also where transport faults act (drop, silence,
delay, garbage, spurious errors) and where two IEEE 488.2 conditions arise: a new message that
arrives while a query is still being answered interrupts it (-410, the reply is discarded), and a
query left without its terminator past a deadline is unterminated (-420).
"""

from __future__ import annotations

import os
import select
import socket
import threading
import time
from typing import Protocol

from nightbench.simulators.faults import FaultInjector
from nightbench.simulators.scpi import ScpiInstrument

UNTERMINATED_S = 1.0   # a partial message older than this is dropped (-420 if it was a query)


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
        try:
            self.sock.shutdown(socket.SHUT_RDWR)
        except OSError:
            pass
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


def serve_stream(stream: Stream, instrument: ScpiInstrument, name: str, faults: FaultInjector,
                 lock: threading.Lock, stop: threading.Event, *, can_drop: bool = True) -> None:
    """Serve one client on `stream` until it goes away, a drop fault closes it, or `stop` is set."""
    buf = b""
    last_byte = time.monotonic()
    while not stop.is_set():
        if b"\n" not in buf:
            data = stream.recv(0.1)
            if data is None:
                return
            if data:
                buf += data
                last_byte = time.monotonic()
            elif buf and time.monotonic() - last_byte > UNTERMINATED_S:
                with lock:
                    if b"?" in buf:
                        instrument.push_error(-420, "query without terminator")
                    else:
                        instrument.push_error(-100, "message without terminator")
                buf = b""
            continue
        raw, buf = buf.split(b"\n", 1)
        away = faults.away(name)
        if away == "drop" and can_drop:
            stream.close()
            return
        if away:
            continue  # silent: read and ignored, as a hung instrument would
        fired = faults.on_message(name)
        kinds = {f.kind for f in fired}
        if kinds & {"drop", "silence"}:
            if "drop" in kinds and can_drop:
                stream.close()
                return
            continue
        try:
            message = raw.decode("ascii").rstrip("\r")
        except UnicodeDecodeError:
            with lock:
                instrument.push_error(-100, "non-ASCII bytes in message")
            continue
        with lock:
            reply = instrument.execute(message)
            for fault in fired:
                if fault.kind == "spurious_error":
                    instrument.push_error(fault.code or -221, "spurious (injected)")
        if reply is not None and (b"\n" in buf or stream.pending()):
            with lock:
                instrument.push_error(-410, "a new message arrived before the reply was sent")
            continue
        for fault in fired:
            if fault.kind == "delay":
                time.sleep(fault.delay_s)
        garbage = [f for f in fired if f.kind == "garbage"]
        if garbage:
            if not stream.send(faults.garbage(garbage[0])):
                return
            continue
        if reply is not None and not stream.send(reply.encode("ascii") + b"\n"):
            return
