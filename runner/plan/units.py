"""Several units in one night: the plan keys (`units`, `instruments.switch`, `limits.accept`) and
the checks across them.

The models are pure data like plan/model.py, which imports them; this module imports nothing of
the plan package at module level but plan/base.py (model.py would be a cycle), so a unit's
`path` is typed by the caller: model.py uses `UnitSpec[PathSpec]`, every path form of the
plan's own `path` then works for a unit too (a calibration file included), built by the same
code (plan/path.py).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Annotated, Any, Generic, Literal, TypeVar

from pydantic import AfterValidator, Field, model_validator

from nightbench.drivers.errors import InputError
from nightbench.plan.base import Resource, Strict

P = TypeVar("P")
Finite = Annotated[float, Field(allow_inf_nan=False)]
Bound = Annotated[list[Finite | None], Field(min_length=2, max_length=2)]
QUANTITIES = ("slope_mv_per_db", "intercept_dbm", "dynamic_range_db")  # what limits.accept may bound


def _switch_commands(value: dict[str, str] | None) -> dict[str, str] | None:
    from nightbench.drivers.switch import switch_commands

    switch_commands(value)
    return value


class SwitchSpec(Strict):
    """An RF switch (drivers/switch.py): SCPI-1999 ROUTe by default; `commands` replace any of
    close, query_closed, open_all, error_query (the field is `{channel}`)."""

    driver: Literal["scpi-switch"]
    resource: Resource
    timeout_s: Annotated[float, Field(gt=0, allow_inf_nan=False)] = 2.0
    visa_library: str = "@py"
    baud_rate: Annotated[int, Field(gt=0, le=10_000_000)] | None = None
    commands: Annotated[dict[str, str] | None, AfterValidator(_switch_commands)] = None


class UnitSpec(Strict, Generic[P]):
    """One unit: its id in the report, its switch route and, where its cabling differs, its path."""

    id: Annotated[str, Field(min_length=1, max_length=40, pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")]
    channel: Annotated[int, Field(ge=1, le=9999)]
    path: P | None = None


def _bound(value: list[float | None] | None) -> list[float | None] | None:
    if value is None:
        return None
    low, high = value
    if low is None and high is None:
        raise ValueError("give at least one bound ([low, high], null for an open side)")
    if low is not None and high is not None and low >= high:
        raise ValueError("must be [low, high] with low < high")
    return value


class AcceptSpec(Strict):
    """Acceptance limits per quantity, at every frequency and temperature, and the decision rule
    (analysis/accept.py; JCGM 106:2012: `simple`, or `guarded` with the zone shrunk by U)."""

    rule: Literal["simple", "guarded"] = "guarded"
    slope_mv_per_db: Annotated[Bound | None, AfterValidator(_bound)] = None
    intercept_dbm: Annotated[Bound | None, AfterValidator(_bound)] = None
    dynamic_range_db: Annotated[Bound | None, AfterValidator(_bound)] = None

    @model_validator(mode="after")
    def _some(self) -> AcceptSpec:
        if all(getattr(self, q) is None for q in QUANTITIES):
            raise ValueError(f"give limits for at least one of {', '.join(QUANTITIES)}")
        return self

    def limits(self) -> dict[str, tuple[float | None, float | None]]:
        """quantity -> (low, high), for the quantities given."""
        out: dict[str, tuple[float | None, float | None]] = {}
        for q in QUANTITIES:
            value = getattr(self, q)
            if value is not None:
                out[q] = (value[0], value[1])
        return out


def check_units(plan: Any, fail: Callable[..., InputError]) -> None:
    """Ids and channels unique; units need a switch and a switch needs units (meter channels are
    not implemented: a unit is always a switch route)."""
    units = plan.units or []
    switch = plan.instruments.switch
    if units and switch is None:
        raise fail(
            "units need an RF switch under instruments.switch (driver scpi-switch): each unit's channel is a "
            "switch route; meter channels are not supported",
            "units",
        )
    if switch is not None and not units:
        raise fail("a switch needs the units behind its routes under `units` ({id, channel} each)", "instruments")
    seen_ids: dict[str, int] = {}
    seen_channels: dict[int, int] = {}
    for i, unit in enumerate(units):
        if unit.id in seen_ids:
            raise fail(
                f"unit id {unit.id!r} is also unit {seen_ids[unit.id] + 1}'s: ids must be unique", "units", i, "id"
            )
        if unit.channel in seen_channels:
            raise fail(
                f"channel {unit.channel} is also unit {units[seen_channels[unit.channel]].id!r}'s: "
                "each unit needs its own route",
                "units",
                i,
                "channel",
            )
        seen_ids[unit.id] = i
        seen_channels[unit.channel] = i
