"""A SCPI session over any transport: identification, synchronised settings, the error queue.

Settings go out as ONE program message, `<settings>;*OPC?;:SYSTem:ERRor?`, so a batch costs one
round trip (no Nagle stall between small writes), is known to be finished (`*OPC?`), and is known
to have been accepted (an error-queue entry means the setting may not have happened: invariant 4).
"""

from __future__ import annotations

from drivers.errors import InstrumentError, ScpiError
from drivers.transport import Transport

NO_ERROR_CODE = 0


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
    """SCPI discipline on top of a transport; knows nothing about what the instrument is."""

    MAX_DRAIN = 32  # an error queue deeper than this is itself a fault

    def __init__(self, transport: Transport, name: str) -> None:
        self.transport = transport
        self.name = name
        self.idn = ""

    @property
    def resource(self) -> str:
        return self.transport.resource

    def identify(self) -> str:
        """Ask *IDN? (opening a socket proves nothing; the first reply does)."""
        reply = self.transport.query("*IDN?")
        if not reply:
            raise InstrumentError("empty reply to *IDN?", resource=self.resource, command="*IDN?")
        self.idn = reply
        return reply

    def query(self, command: str) -> str:
        return self.transport.query(command)

    def apply(self, commands: list[str]) -> None:
        """Send settings, wait for completion, and raise ScpiError if any was refused."""
        program = join_program(commands)
        reply = self.transport.query(program + ";*OPC?;:SYSTem:ERRor?")
        units = split_response(reply)
        if len(units) != 2 or units[0] not in ("1", "+1"):
            raise InstrumentError(
                f"unexpected reply {reply!r} to a synchronised setting",
                resource=self.resource,
                command=program,
            )
        code, message = parse_error(units[1])
        if code != NO_ERROR_CODE:
            more = self.drain_errors()
            detail = "; ".join([f"{code} {message}"] + [f"{c} {m}" for c, m in more])
            raise ScpiError(f"{self.name} refused a setting: {detail}", resource=self.resource,
                            command=program, scpi_code=code)

    def drain_errors(self) -> list[tuple[int, str]]:
        """Read the error queue until it says 0; return what was in it."""
        found = []
        for _ in range(self.MAX_DRAIN):
            code, message = parse_error(self.transport.query(":SYSTem:ERRor?"))
            if code == NO_ERROR_CODE:
                return found
            found.append((code, message))
        raise InstrumentError("error queue does not empty", resource=self.resource)

    def check_clean(self, what: str) -> None:
        """Raise if the error queue holds anything (after configuration, say)."""
        errors = self.drain_errors()
        if errors:
            code, message = errors[0]
            detail = "; ".join(f"{c} {m}" for c, m in errors)
            raise ScpiError(f"{self.name} reported errors after {what}: {detail}",
                            resource=self.resource, scpi_code=code)
