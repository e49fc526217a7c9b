"""Build the instrument roles a plan names: the one place where plan specs meet nightbench.drivers.

Above this module the engine and recovery see roles (drivers/roles.py), never a transport or a
session: how a role talks to its instrument is the driver's business.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TypeVar

from nightbench.drivers.dialect import METER_COMMANDS, SOURCE_COMMANDS, merged
from nightbench.drivers.errors import ConnectionLost, InstrumentError, NightbenchError
from nightbench.drivers.meter import ScpiDmm, SerialAdc
from nightbench.drivers.roles import MeterRole, Role, SourceRole
from nightbench.drivers.source import RfSource
from nightbench.drivers.transport import Link
from nightbench.plan.model import AdcSpec, DmmSpec, Plan, SourceSpec

R = TypeVar("R", bound=Role)


def _link(spec: SourceSpec | DmmSpec | AdcSpec) -> Link:
    return Link(spec.resource, timeout_s=spec.timeout_s, visa_library=spec.visa_library, baud_rate=spec.baud_rate)


def _open(name: str, spec: SourceSpec | DmmSpec | AdcSpec, build: Callable[[Link], R]) -> R:
    """Open a role, prove the instrument answers, then configure it; the link is closed if a step
    fails, and the error says which step (its type and fields kept)."""
    try:
        role = build(_link(spec))
    except NightbenchError as exc:
        exc.add_context(f"the {name} cannot be opened", resource=spec.resource)
        raise
    steps: tuple[tuple[str, Callable[[], None]], ...] = (
        ("did not identify itself", role.prove),
        ("could not be configured", role.configure),
    )
    for failed, step in steps:
        try:
            step()
        except NightbenchError as exc:
            role.close()
            exc.add_context(f"the {name} {failed}", resource=spec.resource)
            raise
    return role


def open_source(spec: SourceSpec) -> SourceRole:
    """Open the source and make it safe before anything else (RF off, invariant 2)."""
    commands = merged(SOURCE_COMMANDS, spec.commands)
    return _open(
        "source", spec, lambda link: RfSource.open(link, min_dbm=spec.min_dbm, max_dbm=spec.max_dbm, commands=commands)
    )


def open_meter(spec: DmmSpec | AdcSpec) -> MeterRole:
    if isinstance(spec, AdcSpec):
        adc = spec
        return _open(
            "meter",
            adc,
            lambda link: SerialAdc.open(
                link,
                query=adc.query,
                pattern=adc.pattern,
                scale=adc.scale,
                offset=adc.offset,
                identify=adc.identify,
                setup=adc.setup,
                overload=adc.overload,
            ),
        )
    commands = merged(METER_COMMANDS, spec.commands)
    dmm = spec
    return _open("meter", dmm, lambda link: ScpiDmm.open(link, nplc=dmm.nplc, range_v=dmm.range_v, commands=commands))


@dataclass
class Bench:
    source: SourceRole
    meter: MeterRole

    @classmethod
    def open(cls, plan: Plan) -> Bench:
        source = open_source(plan.instruments.source)
        try:
            meter = open_meter(plan.instruments.meter)
        except BaseException:
            source.close()
            raise
        return cls(source, meter)

    def role(self, name: str) -> Role:
        return {"source": self.source, "meter": self.meter}[name]

    def role_of(self, exc: InstrumentError) -> str | None:
        """Which instrument an error came from ('source', 'meter'), by its resource."""
        for name in ("source", "meter"):
            if exc.resource and exc.resource == self.role(name).resource:
                return name
        return None

    def reconnect(self, name: str, should_stop: Callable[[], bool], attempts: int = 3) -> None:
        """A NEW link to one instrument, then its known state again (the source: RF off first).
        A link that comes back out of step (a late reply) is reopened again."""
        role = self.role(name)
        for attempt in range(1, attempts + 1):
            try:
                role.reconnect(should_stop)
                role.configure()
                return
            except ConnectionLost:
                raise
            except InstrumentError:
                if attempt == attempts:
                    raise

    def close(self) -> None:
        for role in (self.source, self.meter):
            role.close()
