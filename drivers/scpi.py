"""A SCPI session over any transport: identification, synchronised settings, the error queue,
and reconnects.

Settings go out as ONE program message, `<settings>;<readbacks>;*OPC?;<error query>`, so a batch
costs one round trip (no Nagle stall between small writes), is known to be finished (`*OPC?`),
is read back, and is known to have been accepted: an error-queue entry means the setting may not
have happened (invariant 4), and the caller gets ScpiError, never a silent success.
"""

from __future__ import annotations

import time
from collections.abc import Callable

from nightbench.drivers.errors import ConnectionLost, InstrumentError, ScpiError
from nightbench.drivers.transport import Transport

NO_ERROR_CODE = 0
BACKOFF_S = (0.1, 0.3, 0.7, 1.5)   # waits before each reconnect attempt


def join_program(commands: list[str]) -> str:
    """Join commands into one program message; each rooted with ':' so none is path-relative."""
    rooted = [c if c.startswith((":", "*")) else ":" + c for c in commands]
    return ";".join(rooted)


def split_response(reply: str) -> list[str]:
    """Split a response message into its units at ';' outside quoted strings (IEEE 488.2 8.4)."""
    units, current, quote = [], [], ""
    for ch in reply:
        if quote:
            current.append(ch)
            if ch == quote:
                quote = ""
        elif ch in "\"'":
            quote = ch
            current.append(ch)
        elif ch == ";":
            units.append("".join(current).strip())
            current = []
        else:
            current.append(ch)
    units.append("".join(current).strip())
    return units


def parse_error(entry: str) -> tuple[int, str]:
    """`-222,"Data out of range"` -> (-222, 'Data out of range') (SCPI-1999 21.8)."""
    code_text, _, message = entry.partition(",")
    try:
        code = int(code_text.strip().lstrip("+"))
    except ValueError as exc:
        raise InstrumentError(f"unreadable error-queue entry {entry!r}") from exc
    return code, message.strip().strip('"')


class ScpiSession:
    """SCPI discipline on top of a transport; knows nothing about what the instrument is.

    `opener` makes a NEW transport for a reconnect (reopening the same pyvisa object silently
    resets its timeout and terminations: FIELD-NOTES trap 5).
    """

    MAX_DRAIN = 32  # an error queue deeper than this is itself a fault

    def __init__(self, transport: Transport, name: str, *, opener: Callable[[], Transport] | None = None,
                 error_query: str = ":SYSTem:ERRor?", idn_query: str = "*IDN?") -> None:
        self.transport = transport
        self.name = name
        self.opener = opener
        self.error_query = error_query
        self.idn_query = idn_query
        self.idn = ""

    @property
    def resource(self) -> str:
        return self.transport.resource

    def identify(self) -> str:
        """Ask for the identity (opening a socket proves nothing; the first reply does)."""
        reply = self.transport.query(self.idn_query)
        if not reply:
            raise InstrumentError(f"empty reply to {self.idn_query}", resource=self.resource,
                                  command=self.idn_query)
        self.idn = reply
        return reply

    def query(self, command: str) -> str:
        return self.transport.query(command)

    def apply(self, commands: list[str], readbacks: list[str] = ()) -> list[str]:
        """Send settings, read back `readbacks`, wait for completion; ScpiError if refused."""
        program = join_program(list(commands) + list(readbacks))
        reply = self.transport.query(f"{program};*OPC?;{self.error_query}")
        units = split_response(reply)
        n = len(readbacks)
        if len(units) != n + 2 or units[n] not in ("1", "+1"):
            raise InstrumentError(f"unexpected reply {reply!r} to a synchronised setting",
                                  resource=self.resource, command=program)
        self._raise_if_error(units[n + 1], program, "refused a setting")
        return units[:n]

    def query_checked(self, command: str) -> str:
        """A query and the error queue in one round trip: the reply only counts if no error came."""
        reply = self.transport.query(f"{join_program([command])};{self.error_query}")
        units = split_response(reply)
        if len(units) != 2:
            raise InstrumentError(f"unexpected reply {reply!r}", resource=self.resource, command=command)
        self._raise_if_error(units[1], command, "reported an error")
        return units[0]

    def _raise_if_error(self, entry: str, program: str, what: str) -> None:
        code, message = parse_error(entry)
        if code == NO_ERROR_CODE:
            return
        more = self.drain_errors()
        detail = "; ".join([f"{code} {message}"] + [f"{c} {m}" for c, m in more])
        raise ScpiError(f"{self.name} {what}: {detail}", resource=self.resource, command=program, scpi_code=code)

    def drain_errors(self) -> list[tuple[int, str]]:
        """Read the error queue until it says 0; return what was in it."""
        found = []
        for _ in range(self.MAX_DRAIN):
            code, message = parse_error(self.transport.query(self.error_query))
            if code == NO_ERROR_CODE:
                return found
            found.append((code, message))
        raise InstrumentError("error queue does not empty", resource=self.resource)

    def reconnect(self, should_stop: Callable[[], bool] = lambda: False) -> None:
        """Drop the link and open a new one, with backoff, until the instrument answers with the
        identity it had; ConnectionLost if it never does.

        A reply that arrives late, after its query timed out, lands on the next query (FIELD-NOTES
        trap 4; on a serial line even across a reopen), so the identity is compared, not just read.
        """
        if self.opener is None:
            raise ConnectionLost("lost and cannot be reopened", resource=self.resource)
        known = self.idn
        self.transport.close()
        last: Exception | None = None
        for wait in BACKOFF_S:
            if should_stop():
                break
            time.sleep(wait)
            try:
                self.transport = self.opener()
                self.transport.flush_input()
                if known and self.identify() != known:
                    raise InstrumentError(f"answered {self.idn!r} instead of its identity (a stale reply?)",
                                          resource=self.resource)
                if not known:
                    self.identify()
                return
            except InstrumentError as exc:   # ConnectionLost included
                last = exc
                self.idn = known
                self.transport.close()
        raise ConnectionLost(f"the {self.name} did not come back after {len(BACKOFF_S)} reconnect attempts ({last})",
                             resource=self.resource) from last
