"""Build the instrument roles a plan names: the one place where plan specs meet nightbench.drivers.

Above this module the engine and recovery see roles (drivers/roles.py), never a transport or a
session: how a role talks to its instrument is the driver's business.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TypeVar

from nightbench.drivers.chamber import ScpiChamber
from nightbench.drivers.dialect import CHAMBER_COMMANDS, METER_COMMANDS, SOURCE_COMMANDS, merged
from nightbench.drivers.errors import ConnectionLost, InstrumentError, NightbenchError
from nightbench.drivers.meter import ScpiDmm, SerialAdc
from nightbench.drivers.roles import ChamberRole, MeterRole, Role, SensorRole, SourceRole, SwitchRole
from nightbench.drivers.sensor import SENSOR_COMMANDS, ScpiPowerSensor
from nightbench.drivers.source import RfSource
from nightbench.drivers.switch import ScpiSwitch, switch_commands
from nightbench.drivers.transport import Link
from nightbench.plan.calspec import SensorSpec
from nightbench.plan.model import AdcSpec, ChamberSpec, DmmSpec, Plan, SourceSpec
from nightbench.plan.units import SwitchSpec

R = TypeVar("R", bound=Role)


Spec = SourceSpec | DmmSpec | AdcSpec | ChamberSpec | SwitchSpec | SensorSpec


def _link(spec: Spec) -> Link:
    return Link(spec.resource, timeout_s=spec.timeout_s, visa_library=spec.visa_library, baud_rate=spec.baud_rate)


def _open(name: str, spec: Spec, build: Callable[[Link], R]) -> R:
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


def open_chamber(spec: ChamberSpec) -> ChamberRole:
    """Open the chamber: proven and its error queue emptied, its setpoint left as it is."""
    commands = merged(CHAMBER_COMMANDS, spec.commands)
    return _open(
        "chamber", spec, lambda link: ScpiChamber.open(link, min_c=spec.min_c, max_c=spec.max_c, commands=commands)
    )


def open_switch(spec: SwitchSpec) -> SwitchRole:
    """Open the switch: proven and its error queue emptied, its routes left as they are."""
    commands = switch_commands(spec.commands)
    return _open("switch", spec, lambda link: ScpiSwitch.open(link, commands=commands))


def open_sensor(spec: SensorSpec) -> SensorRole:
    """Open the power sensor (`calibrate`): proven, then configured, like every role."""
    commands = merged(SENSOR_COMMANDS, spec.commands)
    return _open("sensor", spec, lambda link: ScpiPowerSensor.open(link, commands=commands))


@dataclass
class Bench:
    source: SourceRole
    meter: MeterRole
    chamber: ChamberRole | None = None
    switch: SwitchRole | None = None

    @classmethod
    def open(cls, plan: Plan) -> Bench:
        """The source first, made safe at once (RF off), before the chamber is touched: after a
        hard kill RF must be off before anything else happens on the bench (invariant 2)."""
        source = open_source(plan.instruments.source)
        opened: list[Role] = [source]
        try:
            meter = open_meter(plan.instruments.meter)
            opened.append(meter)
            spec = plan.instruments.chamber
            chamber = open_chamber(spec) if spec is not None else None
            if chamber is not None:
                opened.append(chamber)
            switch = open_switch(plan.instruments.switch) if plan.instruments.switch is not None else None
        except BaseException:
            for role in opened:
                role.close()
            raise
        return cls(source, meter, chamber, switch)

    def names(self) -> tuple[str, ...]:
        return tuple(n for n in ("source", "meter", "chamber", "switch") if getattr(self, n) is not None)

    def role(self, name: str) -> Role:
        role = {"source": self.source, "meter": self.meter, "chamber": self.chamber, "switch": self.switch}[name]
        assert role is not None
        return role

    def role_of(self, exc: InstrumentError) -> str | None:
        """Which instrument an error came from ('source', 'meter', 'chamber'), by its resource."""
        for name in self.names():
            if exc.resource and exc.resource == self.role(name).resource:
                return name
        return None

    def reconnect(self, name: str, should_stop: Callable[[], bool], attempts: int = 3) -> None:
        """A NEW link to one instrument, then its known state again (the source: RF off first, then
        modulation and level offset off, as at the start: measure/record.py). A link that comes
        back out of step (a late reply) is reopened again."""
        role = self.role(name)
        for attempt in range(1, attempts + 1):
            try:
                role.reconnect(should_stop)
                role.configure()
                known = getattr(role, "record_state", None)
                if known is not None:  # a rebooted instrument may have recalled a previous user's
                    known(preset=False)  # settings (a level offset): put it back in the run's known state
                return
            except ConnectionLost:
                raise
            except InstrumentError:
                if attempt == attempts:
                    raise

    def close(self) -> None:
        for name in self.names():
            self.role(name).close()
