"""A SCPI session: a line session (drivers/line.py) plus `*IDN?`, synchronised settings and the
error queue.

Settings go out as ONE program message, `<settings>;<readbacks>;*OPC?;<error query>`, so a batch
costs one round trip (no Nagle stall between small writes), is known to be finished (`*OPC?`),
is read back, and is known to have been accepted: an error-queue entry means the setting may not
have happened (invariant 4), and the caller gets ScpiError, never a silent success.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

from nightbench.drivers.errors import InstrumentError, ScpiError
from nightbench.drivers.line import LineSession
from nightbench.drivers.transport import Transport

NO_ERROR_CODE = 0


def join_program(commands: list[str]) -> str:
    """Join commands into one program message; each rooted with ':' so none is path-relative."""
    rooted = [c if c.startswith((":", "*")) else ":" + c for c in commands]
    return ";".join(rooted)


def split_response(reply: str) -> list[str]:
    """Split a response message into its units at ';' outside quoted strings (IEEE 488.2 8.4)."""
    units: list[str] = []
    current: list[str] = []
    quote = ""
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


def _is_error_entry(unit: str) -> bool:
    """Whether a response unit reads as an error-queue entry other than 0,"No error"."""
    try:
        code, _ = parse_error(unit)
    except InstrumentError:
        return False
    return code != NO_ERROR_CODE and '"' in unit


class ScpiSession(LineSession):
    """SCPI discipline on top of a transport; knows nothing about what the instrument is. The
    identity query is not optional: every SCPI instrument answers `*IDN?` (IEEE 488.2 10.14)."""

    MAX_DRAIN = 32  # an error queue deeper than this is itself a fault

    def __init__(
        self,
        transport: Transport,
        name: str,
        *,
        opener: Callable[[], Transport] | None = None,
        error_query: str = ":SYSTem:ERRor?",
        idn_query: str = "*IDN?",
    ) -> None:
        super().__init__(transport, name, opener=opener, idn_query=idn_query)
        self.error_query = error_query

    def apply(self, commands: Sequence[str], readbacks: Sequence[str] = ()) -> list[str]:
        """Send settings, read back `readbacks`, wait for completion; ScpiError if refused."""
        program = join_program(list(commands) + list(readbacks))
        reply = self.transport.query(f"{program};*OPC?;{self.error_query}")
        units = split_response(reply)
        n = len(readbacks)
        if len(units) != n + 2 or units[n] not in ("1", "+1"):
            # a refused query (e.g. an unknown header) leaves its unit out: the error says why
            if _is_error_entry(units[-1]):
                self._raise_if_error(units[-1], program, "refused a setting")
            raise InstrumentError(
                f"unexpected reply {reply!r} to a synchronised setting", resource=self.resource, command=program
            )
        self._raise_if_error(units[n + 1], program, "refused a setting")
        return units[:n]

    def query_checked(self, command: str) -> str:
        """A query and the error queue in one round trip: the reply only counts if no error came."""
        return self.checked_reply(self.transport.query(self.checked_program(command)), command)

    def checked_program(self, command: str) -> str:
        """`command` with the error query behind it: one message, one reply (query_checked)."""
        return f"{join_program([command])};{self.error_query}"

    def checked_reply(self, reply: str, command: str) -> str:
        """The reply to `checked_program(command)` without its error entry; ScpiError if there was one."""
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
        found: list[tuple[int, str]] = []
        for _ in range(self.MAX_DRAIN):
            code, message = parse_error(self.transport.query(self.error_query))
            if code == NO_ERROR_CODE:
                return found
            found.append((code, message))
        raise InstrumentError("error queue does not empty", resource=self.resource)
