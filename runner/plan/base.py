"""What every plan model shares: strict models (unknown keys refused, no NaN or infinity, frozen)
and resource strings checked at plan time without opening anything. Its own module, so that
plan/model.py and the section models it imports (calspec.py, units.py) take it from one place."""

from __future__ import annotations

from typing import Annotated

from pydantic import AfterValidator, BaseModel, ConfigDict


class Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, frozen=True)


def valid_resource(value: str) -> str:
    """A VISA or serial resource string, checked (drivers.transport.check_resource), stripped."""
    from nightbench.drivers.transport import check_resource

    problem = check_resource(value)
    if problem:
        raise ValueError(problem)
    return value.strip()


Resource = Annotated[str, AfterValidator(valid_resource)]
