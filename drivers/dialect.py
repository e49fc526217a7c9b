"""Command templates for every role operation, so a slightly different SCPI needs no code.

A plan may override any template by name (`instruments.<role>.commands`). Templates are Python
format strings; the fields each one may use are listed here and checked at plan time.
"""

from __future__ import annotations

SOURCE_COMMANDS: dict[str, str] = {
    "set_frequency": ":SOURce:FREQuency:CW {frequency_hz:.3f} HZ",
    "set_level": ":SOURce:POWer:LEVel {level_dbm:.3f} DBM",
    "output_on": ":OUTPut:STATe ON",
    "output_off": ":OUTPut:STATe OFF",
    "query_frequency": ":SOURce:FREQuency:CW?",
    "query_level": ":SOURce:POWer:LEVel?",
    "query_output": ":OUTPut:STATe?",
    "error_query": ":SYSTem:ERRor?",
    # the run record (measure/record.py): a preset where the plan allows it, then every modulation
    # and the level offset off, and read back. Several units may be joined with ';' (each query
    # unit answers one value); an empty template means the instrument has no such setting.
    "preset": "*RST",
    "modulation_off": ":SOURce:AM:STATe OFF;:SOURce:FM:STATe OFF;:SOURce:PM:STATe OFF;:SOURce:PULM:STATe OFF",
    "query_modulation": ":SOURce:AM:STATe?;:SOURce:FM:STATe?;:SOURce:PM:STATe?;:SOURce:PULM:STATe?",
    "offset_off": ":SOURce:POWer:LEVel:OFFSet 0",
    "query_offset": ":SOURce:POWer:LEVel:OFFSet?",
}

METER_COMMANDS: dict[str, str] = {
    "configure": ":CONFigure:VOLTage:DC",
    "set_nplc": ":SENSe:VOLTage:DC:NPLCycles {nplc:g}",
    "set_range": ":SENSe:VOLTage:DC:RANGe {range_v:g}",
    "set_trigger": ":TRIGger:SOURce IMMediate",
    "read": "READ?",
    "error_query": ":SYSTem:ERRor?",
    # read back for the run record (measure/record.py); an empty template: not asked
    "query_function": ":SENSe:FUNCtion?",
    "query_range": ":SENSe:VOLTage:DC:RANGe?",
    "query_autorange": ":SENSe:VOLTage:DC:RANGe:AUTO?",
    "query_nplc": ":SENSe:VOLTage:DC:NPLCycles?",
    "query_autozero": ":SENSe:ZERO:AUTO?",
}

# There is no SCPI standard for temperature chambers: these SCPI-styled names are nightbench's own
# default (the simulated chamber speaks them); a real chamber's commands go under `commands`.
CHAMBER_COMMANDS: dict[str, str] = {
    "set_temperature": ":CHAMber:SETPoint {temperature_c:.2f}",
    "query_setpoint": ":CHAMber:SETPoint?",
    "query_temperature": ":CHAMber:TEMPerature?",
    "start": ":CHAMber:CONDitioning ON",
    "stop": ":CHAMber:CONDitioning OFF",
    "error_query": ":SYSTem:ERRor?",
}

FIELDS = {"frequency_hz": 1e9, "level_dbm": -10.0, "nplc": 1.0, "range_v": 10.0, "temperature_c": 25.0}


def merged(defaults: dict[str, str], overrides: dict[str, str] | None) -> dict[str, str]:
    """Defaults with a plan's overrides; raises ValueError naming a bad name or template."""
    table = dict(defaults)
    for name, template in (overrides or {}).items():
        if name not in defaults:
            raise ValueError(f"unknown command name '{name}' (known: {', '.join(defaults)})")
        try:
            template.format(**FIELDS)
        except (KeyError, IndexError, ValueError) as exc:
            allowed = [f for f in FIELDS if "{" + f in defaults[name]]
            raise ValueError(
                f"template {template!r} for '{name}' does not format "
                f"(fields it may use: {', '.join(allowed) or 'none'}): {exc}"
            ) from None
        table[name] = template
    return table
