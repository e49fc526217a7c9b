"""The run record: at every start (run, resume, a served job) each instrument is put in a known
state and what it then says about itself is stored, so an auditor can see the setup of the night.

A previous user's settings (a modulation left on, a level offset, an autoranging meter) would
otherwise change the night without a trace. The source gets a preset where the plan allows it
(`instruments.source.preset`; a preset may undo what the lab set up on purpose, so it is off by
default), then every modulation and the level offset off, read back; the meter's function, range,
autorange, NPLC and autozero are read back; a chamber reports its setpoint and air temperature;
a serial ADC with no queries for its settings records what the plan set. Each goes into the
`instruments` table with its identity and calibration-due date (plan/due.py), and an event.
A refused setting or a read-back that disagrees is a fault while opening, naming the instrument
and the command: retried like one (engine._open_bench), then the start fails (RF is off: the
source was made safe when opened).
"""

from __future__ import annotations

import json
from datetime import date
from typing import Any

from nightbench.drivers.errors import NightbenchError
from nightbench.measure.roles import Bench
from nightbench.plan.due import overdue
from nightbench.plan.model import Plan
from nightbench.store.db import Store


def open_recorded(plan: Plan, store: Store, run_id: int) -> Bench:
    """The bench opened (the source first, RF off) and recorded; closed again if the record
    fails, so the engine retries a transient fault here like one while opening."""
    bench = Bench.open(plan)
    try:
        record_bench(bench, plan, store, run_id)
    except BaseException:
        bench.close()
        raise
    return bench


def record_bench(bench: Bench, plan: Plan, store: Store, run_id: int) -> None:
    """Known state, read back and stored, for every instrument of the bench (source first)."""
    late = {o.role: o for o in overdue(plan)}
    for name in bench.names():
        role = bench.role(name)
        spec = getattr(plan.instruments, name)
        recorder = getattr(role, "record_state", None)
        try:
            state: dict[str, Any] = recorder(preset=bool(getattr(spec, "preset", False))) if recorder else {}
        except NightbenchError as exc:
            exc.add_context(f"putting the {name} in a known state and reading it back", resource=spec.resource)
            raise
        due = getattr(spec, "calibration_due", None)
        if name in late:
            state["calibration"] = late[name].note(date.today())
            store.event(run_id, "calibration", f"{name}: {state['calibration']}")
        store.record_instrument(
            run_id,
            role=name,
            driver=spec.driver,
            resource=spec.resource,
            identity=role.identity,
            calibration_due=due.isoformat() if due is not None else None,
            state=state,
        )
        store.event(run_id, "instruments", f"{name}: {role.identity or '(no identity)'}; {json.dumps(state)}")
