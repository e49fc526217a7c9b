"""Build the instrument roles a plan names: the one place where plan specs meet nightbench.drivers."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from nightbench.drivers.dialect import METER_COMMANDS, SOURCE_COMMANDS, merged
from nightbench.drivers.errors import ConnectionLost, InstrumentError, NightbenchError
from nightbench.drivers.meter import ScpiDmm, SerialAdc
from nightbench.drivers.scpi import ScpiSession
from nightbench.drivers.source import RfSource
from nightbench.drivers.transport import open_transport
from nightbench.plan.model import AdcSpec, Plan, SourceSpec


def _session(spec: Any, name: str, **kwargs: Any) -> ScpiSession:
    def opener() -> Any:
        return open_transport(spec.resource, timeout_s=spec.timeout_s, visa_library=spec.visa_library,
                              baud_rate=spec.baud_rate)
    try:
        session = ScpiSession(opener(), name, opener=opener, **kwargs)
    except NightbenchError as exc:
        raise type(exc)(f"the {name} cannot be opened: {exc.message}", resource=spec.resource) from exc
    try:
        session.identify()
    except NightbenchError as exc:
        session.transport.close()
        raise type(exc)(f"the {name} did not identify itself: {exc.message}", resource=spec.resource,
                        command=exc.command) from exc
    return session


def open_source(spec: SourceSpec) -> RfSource:
    """Open the source and make it safe before anything else (RF off, invariant 2)."""
    commands = merged(SOURCE_COMMANDS, spec.commands)
    session = _session(spec, "source", error_query=commands["error_query"])
    return _configured(RfSource(session, min_dbm=spec.min_dbm, max_dbm=spec.max_dbm, commands=commands))


def open_meter(spec: Any) -> ScpiDmm | SerialAdc:
    if isinstance(spec, AdcSpec):
        session = _session(spec, "meter", idn_query=spec.identify or spec.query)
        meter: ScpiDmm | SerialAdc = SerialAdc(session, query=spec.query, pattern=spec.pattern, scale=spec.scale,
                                               offset=spec.offset, setup=spec.setup, overload=spec.overload)
    else:
        commands = merged(METER_COMMANDS, spec.commands)
        session = _session(spec, "meter", error_query=commands["error_query"])
        meter = ScpiDmm(session, nplc=spec.nplc, range_v=spec.range_v, commands=commands)
    return _configured(meter)


def _configured(role: Any) -> Any:
    """Configure a freshly opened role; its link is closed if that fails."""
    try:
        role.configure()
    except NightbenchError:
        role.session.transport.close()
        raise
    return role


@dataclass
class Bench:
    source: RfSource
    meter: ScpiDmm | SerialAdc

    @classmethod
    def open(cls, plan: Plan) -> Bench:
        source = open_source(plan.instruments.source)
        try:
            meter = open_meter(plan.instruments.meter)
        except BaseException:
            source.session.transport.close()
            raise
        return cls(source, meter)

    def role_of(self, exc: InstrumentError) -> str | None:
        """Which instrument an error came from ('source', 'meter'), by its resource."""
        for name in ("source", "meter"):
            if exc.resource and exc.resource == getattr(self, name).session.resource:
                return name
        return None

    def reconnect(self, name: str, should_stop: Any, attempts: int = 3) -> None:
        """A NEW link to one instrument, then its known state again (the source: RF off first).
        A link that comes back out of step (a late reply) is reopened again."""
        role = getattr(self, name)
        if name == "source":
            self.source.forget()
        for attempt in range(1, attempts + 1):
            try:
                role.session.reconnect(should_stop)
                role.configure()
                return
            except ConnectionLost:
                raise
            except InstrumentError:
                if attempt == attempts:
                    raise

    def close(self) -> None:
        for role in (self.source, self.meter):
            role.session.transport.close()
