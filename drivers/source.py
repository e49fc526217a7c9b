"""The RF source role: frequency, level, output (SCPI-1999 SOURce/OUTPut by default)."""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

from nightbench.drivers.dialect import SOURCE_COMMANDS
from nightbench.drivers.errors import InstrumentError, SafetyError, ScpiError
from nightbench.drivers.line import SessionRole
from nightbench.drivers.scpi import ScpiSession, split_response
from nightbench.drivers.transport import Link

LEVEL_READBACK_DB = 0.01
FREQ_READBACK_REL = 1e-9
OFFSET_READBACK_DB = 1e-6
# The source's own level limits when a plan names none (plan/model.py SourceSpec uses these too):
# wide enough for any generator's range, and plans beyond a source's real limits name them.
DEFAULT_MIN_DBM = -130.0
DEFAULT_MAX_DBM = 20.0


class RfSource(SessionRole):
    """An RF signal generator. Refuses levels outside its configured limits before sending, and
    reads every setting back in the same message, so what is stored is what the source has."""

    def __init__(
        self,
        session: ScpiSession,
        *,
        min_dbm: float = DEFAULT_MIN_DBM,
        max_dbm: float = DEFAULT_MAX_DBM,
        commands: dict[str, str] | None = None,
    ) -> None:
        self.session: ScpiSession = session
        self.min_dbm = min_dbm
        self.max_dbm = max_dbm
        self.commands = commands or dict(SOURCE_COMMANDS)
        self.forget()

    @classmethod
    def open(
        cls,
        link: Link,
        *,
        min_dbm: float = DEFAULT_MIN_DBM,
        max_dbm: float = DEFAULT_MAX_DBM,
        commands: dict[str, str] | None = None,
    ) -> RfSource:
        """A source on a new link (not yet proven to answer: see `prove`)."""
        table = commands or dict(SOURCE_COMMANDS)
        session = ScpiSession(link.open(), "source", opener=link.open, error_query=table["error_query"])
        return cls(session, min_dbm=min_dbm, max_dbm=max_dbm, commands=table)

    def prove(self) -> None:
        """Ask for the identity: opening a link proves nothing, the first reply does."""
        self.session.identify()

    def reconnect(self, should_stop: Callable[[], bool]) -> None:
        """A new link to the same source; nothing is assumed about its state afterwards."""
        self.forget()
        self.session.reconnect(should_stop)

    def forget(self) -> None:
        """State unknown (after a reconnect): nothing is assumed about the instrument."""
        self.frequency_hz: float | None = None
        self.level_dbm: float | None = None
        self.output_on: bool | None = None

    def configure(self) -> None:
        """Start from a known state: output off FIRST (invariant 2: after a crash the source may
        still be on), then an empty error queue. Errors left from an earlier session make the
        first attempt look refused, so it is drained and done again."""
        try:
            self.set(output=False)
        except ScpiError:
            self.session.drain_errors()
            self.set(output=False)

    def set(
        self, *, frequency_hz: float | None = None, level_dbm: float | None = None, output: bool | None = None
    ) -> None:
        """Apply any of the three in one synchronised, error-checked, read-back message, level
        first: a caller that lowers the level for a frequency change gets it applied first."""
        c = self.commands
        commands: list[str] = []
        readbacks: list[str] = []
        if level_dbm is not None:
            if not (self.min_dbm <= level_dbm <= self.max_dbm):
                raise SafetyError(
                    f"source level {level_dbm:.2f} dBm is outside the source's limits "
                    f"[{self.min_dbm}, {self.max_dbm}] dBm",
                    resource=self.resource,
                )
            commands.append(c["set_level"].format(level_dbm=level_dbm))
            readbacks.append(c["query_level"])
        if frequency_hz is not None:
            commands.append(c["set_frequency"].format(frequency_hz=frequency_hz))
            readbacks.append(c["query_frequency"])
        if output is not None:
            commands.append(c["output_on"] if output else c["output_off"])
            readbacks.append(c["query_output"])
        if not commands:
            return
        values = iter(self.session.apply(commands, readbacks))
        if level_dbm is not None:
            self._check("level", level_dbm, next(values), abs_tol=LEVEL_READBACK_DB)
            self.level_dbm = level_dbm
        if frequency_hz is not None:
            self._check("frequency", frequency_hz, next(values), rel_tol=FREQ_READBACK_REL)
            self.frequency_hz = frequency_hz
        if output is not None:
            got = next(values).strip().upper()
            if got not in (("1", "ON") if output else ("0", "OFF")):
                raise InstrumentError(
                    f"source output reads back {got!r}, not {'ON' if output else 'OFF'}", resource=self.resource
                )
            self.output_on = output

    def _check(self, what: str, wanted: float, reply: str, *, abs_tol: float = 0.0, rel_tol: float = 0.0) -> None:
        try:
            got = float(reply)
        except ValueError as exc:
            raise InstrumentError(f"source {what} reads back {reply!r}", resource=self.resource) from exc
        if not math.isclose(got, wanted, abs_tol=abs_tol, rel_tol=rel_tol):
            raise InstrumentError(
                f"source {what} reads back {got:g}, not the {wanted:g} that was set", resource=self.resource
            )

    def rf_off(self) -> None:
        self.set(output=False)

    def record_state(self, *, preset: bool = False) -> dict[str, Any]:
        """The known state a run starts from (measure/record.py): a preset if the plan allows it
        (RF off again after it, read back), then every modulation and the level offset off, read
        back in the same message. What is returned is what the source said; InstrumentError
        (naming the query) if it still reports a modulation on or an offset."""
        c = self.commands
        if preset and c["preset"]:
            self.session.apply([c["preset"]])
            self.forget()  # a preset may change anything; nothing is assumed until read back
            self.set(output=False)
        mod_queries = _units(c["query_modulation"])
        offset_queries = _units(c["query_offset"])
        commands = [t for t in (c["modulation_off"], c["offset_off"]) if t]
        replies = self.session.apply(commands, mod_queries + offset_queries) if commands or mod_queries else []
        state: dict[str, Any] = {"preset": bool(preset and c["preset"]), "output": "off"}
        modulation = dict(zip(mod_queries, replies))
        for query, reply in modulation.items():
            if reply.strip().upper() not in ("0", "OFF"):
                raise InstrumentError(
                    f"source modulation reads back {reply!r} after it was switched off",
                    resource=self.resource,
                    command=query,
                )
        state["modulation"] = "off" if mod_queries else "not asked (no query_modulation)"
        state["modulation_readback"] = modulation
        state["level_offset_db"] = None
        for query, reply in zip(offset_queries, replies[len(mod_queries) :]):
            try:
                offset = float(reply)
            except ValueError as exc:
                raise InstrumentError(
                    f"source level offset reads {reply!r}", resource=self.resource, command=query
                ) from exc
            if abs(offset) > OFFSET_READBACK_DB:
                raise InstrumentError(
                    f"source level offset reads back {offset:g} dB after it was set to 0",
                    resource=self.resource,
                    command=query,
                )
            state["level_offset_db"] = offset
        return state


def _units(template: str) -> list[str]:
    """The units of a template joined with ';' (none for an empty one)."""
    return [u for u in split_response(template) if u] if template.strip() else []
