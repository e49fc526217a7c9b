"""The RF switch role: one route closed at a time, read back, every route opened.

Several units share one source and one meter through a switch; the engine closes a unit's route
only with RF off (measure/units.py). The default commands are SCPI-1999 ROUTe (CLOSe, CLOSe?,
OPEN:ALL) with a channel list `(@N)`; a plan replaces any of them under `commands`.
"""

from __future__ import annotations

from collections.abc import Callable

from nightbench.drivers.errors import InstrumentError
from nightbench.drivers.line import SessionRole
from nightbench.drivers.scpi import ScpiSession
from nightbench.drivers.transport import Link

SWITCH_COMMANDS: dict[str, str] = {
    "close": ":ROUTe:CLOSe (@{channel})",
    "query_closed": ":ROUTe:CLOSe? (@{channel})",
    "open_all": ":ROUTe:OPEN:ALL",
    "error_query": ":SYSTem:ERRor?",
}
SAMPLE_FIELDS = {"channel": 1}


def switch_commands(overrides: dict[str, str] | None) -> dict[str, str]:
    """The defaults with a plan's overrides; ValueError naming an unknown name or a bad template."""
    table = dict(SWITCH_COMMANDS)
    for name, template in (overrides or {}).items():
        if name not in SWITCH_COMMANDS:
            raise ValueError(f"unknown command name '{name}' (known: {', '.join(SWITCH_COMMANDS)})")
        try:
            template.format(**SAMPLE_FIELDS)
        except (KeyError, IndexError, ValueError) as exc:
            raise ValueError(f"template {template!r} for '{name}' does not format (fields: channel): {exc}") from None
        table[name] = template
    return table


class ScpiSwitch(SessionRole):
    """A switch on SCPI. `closed` is the channel last closed and read back, None when all are open
    or unknown (after a reconnect)."""

    def __init__(self, session: ScpiSession, *, commands: dict[str, str] | None = None) -> None:
        self.session: ScpiSession = session
        self.commands = commands or dict(SWITCH_COMMANDS)
        self.closed: int | None = None

    @classmethod
    def open(cls, link: Link, *, commands: dict[str, str] | None = None) -> ScpiSwitch:
        table = commands or dict(SWITCH_COMMANDS)
        session = ScpiSession(link.open(), "switch", opener=link.open, error_query=table["error_query"])
        return cls(session, commands=table)

    def prove(self) -> None:
        self.session.identify()

    def configure(self) -> None:
        """An empty error queue; the routes are left as they are (only the unit axis moves them)."""
        self.session.drain_errors()

    def reconnect(self, should_stop: Callable[[], bool]) -> None:
        self.closed = None
        self.session.reconnect(should_stop)

    def open_all(self) -> None:
        self.session.apply([self.commands["open_all"]])
        self.closed = None

    def close_route(self, channel: int) -> None:
        """Close one route (the caller has opened the others)."""
        self.session.apply([self.commands["close"].format(channel=channel)])

    def query_closed(self, channel: int) -> bool:
        """Whether the switch says this route is closed (SCPI-1999 ROUTe:CLOSe?: 1 closed, 0 open)."""
        reply = self.session.query_checked(self.commands["query_closed"].format(channel=channel)).strip()
        if reply not in ("0", "1"):
            raise InstrumentError(
                f"switch route {channel} reads {reply!r}, not 0 or 1",
                resource=self.resource,
                command=self.commands["query_closed"],
            )
        return reply == "1"

    def select(self, channel: int) -> None:
        """Open every route, close this one and read it back; InstrumentError if it reads open."""
        self.open_all()
        self.close_route(channel)
        if not self.query_closed(channel):
            raise InstrumentError(f"route {channel} reads open after closing it", resource=self.resource)
        self.closed = channel
