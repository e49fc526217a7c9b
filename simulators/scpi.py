"""A small SCPI-1999 / IEEE 488.2 command parser for simulated instruments.

Supports what real instruments accept and what a driver will meet: long and short mnemonic
forms, case-insensitivity, optional nodes in brackets, several program message units separated
by ';' (later units relative to the previous header's path unless rooted with ':'), numeric
parameters with unit suffixes, queries joined into one response message, the IEEE 488.2 common
commands, and an error queue with the standard codes and format.
"""

from __future__ import annotations

import math
import re
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass

# SCPI-1999 vol. 2, 21.8: error/event numbers and their standard messages.
ERRORS = {
    0: "No error",
    -100: "Command error",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -121: "Invalid character in number",
    -131: "Invalid suffix",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -350: "Queue overflow",
    -410: "Query INTERRUPTED",
    -420: "Query UNTERMINATED",
}
QUEUE_DEPTH = 10
# The maker field of every simulated *IDN?: plainly not a company (IEEE 488.2 10.14 fields:
# maker, model, serial number, firmware).
MAKER = "Nightbench Simulated Instruments"


class ScpiCommandError(Exception):
    """Raised by a handler: becomes an error-queue entry; the command has no effect."""

    def __init__(self, code: int, detail: str = "") -> None:
        super().__init__(detail)
        self.code = code
        self.detail = detail


@dataclass
class _Node:
    short: str
    long: str
    optional: bool

    def matches(self, token: str) -> bool:
        upper = token.upper()
        if upper.endswith("1") and upper[:-1] in (self.short, self.long):  # numeric suffix 1
            return True
        return upper in (self.short, self.long)


def _parse_pattern(pattern: str) -> list[_Node]:
    """'[SOURce]:FREQuency[:CW]' -> nodes; the upper-case part of each mnemonic is its short form."""
    nodes = []
    for optional, mnemonic in re.findall(r"(\[?):?([A-Za-z*][A-Za-z0-9]*\??)\]?", pattern):
        name = mnemonic.rstrip("?")
        short = "".join(ch for ch in name if ch.isupper() or ch.isdigit() or ch == "*")
        nodes.append(_Node(short=short, long=name.upper(), optional=bool(optional)))
    return nodes


def _match(nodes: list[_Node], tokens: list[str]) -> bool:
    if not tokens:
        return all(n.optional for n in nodes)
    if not nodes:
        return False
    head = nodes[0]
    if head.matches(tokens[0]) and _match(nodes[1:], tokens[1:]):
        return True
    return head.optional and _match(nodes[1:], tokens)


Handler = Callable[[list[str]], "str | None"]

# Unit suffix multipliers (IEEE 488.2 7.7.3); MHZ is mega-hertz by SCPI convention.
SUFFIX_SCALE = {
    "HZ": 1.0,
    "KHZ": 1e3,
    "MHZ": 1e6,
    "MAHZ": 1e6,
    "GHZ": 1e9,
    "DBM": 1.0,
    "DB": 1.0,
    "V": 1.0,
    "MV": 1e-3,
    "UV": 1e-6,
    "KV": 1e3,
    "S": 1.0,
    "MS": 1e-3,
    "US": 1e-6,
}
_MANTISSA = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:\s*[eE]\s*[+-]?\d+)?")
_SUFFIX = re.compile(r"[A-Za-z]+")
_BROKEN_EXPONENT = re.compile(r"[eE]\s*([+-]|$)")  # an exponent begun, its digits missing


def parse_number(
    text: str, units: tuple[str, ...] = (), *, minimum: float | None = None, maximum: float | None = None
) -> float:
    """Decimal numeric program data (IEEE 488.2 7.7.2) with an optional suffix from `units`, or
    MIN/MAX where limits exist. Every malformed form is a ScpiCommandError with its standard code:
    -104 not numeric data at all, -121 a bad character in the number, -131 a suffix not allowed,
    -222 a value outside the limits."""
    word = text.strip()
    if word.upper() in ("MIN", "MINIMUM") and minimum is not None:
        return minimum
    if word.upper() in ("MAX", "MAXIMUM") and maximum is not None:
        return maximum
    m = _MANTISSA.match(word)
    if m is None:
        if word[:1] in ("+", "-", ".") or word[:1].isdigit():
            raise ScpiCommandError(-121, f"not a number: {text!r}")
        raise ScpiCommandError(-104, f"expected a number, got {text!r}")
    rest = word[m.end() :].lstrip()
    if _BROKEN_EXPONENT.match(rest):
        raise ScpiCommandError(-121, f"exponent without digits in {text!r}")
    if rest and not _SUFFIX.fullmatch(rest):
        code = -131 if rest[0].isalpha() else -121
        raise ScpiCommandError(code, f"cannot read {rest!r} in {text!r}")
    value, suffix = float(re.sub(r"\s", "", m.group(0))), rest.upper()
    if suffix:
        if suffix not in units or suffix not in SUFFIX_SCALE:
            raise ScpiCommandError(-131, f"suffix {suffix!r} not allowed here")
        value *= SUFFIX_SCALE[suffix]
    if (
        not math.isfinite(value)
        or (minimum is not None and value < minimum)
        or (maximum is not None and value > maximum)
    ):
        low = "" if minimum is None else f"{minimum:g}"
        high = "" if maximum is None else f"{maximum:g}"
        raise ScpiCommandError(-222, f"{value:g} outside [{low}, {high}]")
    return value


def parse_bool(text: str) -> bool:
    word = text.strip().upper()
    if word in ("ON", "1"):
        return True
    if word in ("OFF", "0"):
        return False
    raise ScpiCommandError(-224, f"expected ON or OFF, got {text!r}")


def split_outside_quotes(text: str, sep: str) -> list[str]:
    parts, current, quote = [], [], ""
    for ch in text:
        if quote:
            current.append(ch)
            if ch == quote:
                quote = ""
        elif ch in "\"'":
            quote = ch
            current.append(ch)
        elif ch == sep:
            parts.append("".join(current))
            current = []
        else:
            current.append(ch)
    parts.append("".join(current))
    return parts


class ScpiInstrument:
    """Base of every simulated SCPI instrument: the tree, the common commands, the error queue."""

    idn = f"{MAKER},Simulated Generic Instrument,0,0.1"

    def __init__(self, error_header: str = "SYSTem:ERRor[:NEXT]?") -> None:
        self._commands: list[tuple[list[_Node], bool, Handler]] = []
        self.errors: deque[tuple[int, str]] = deque()
        self.esr = 0
        self.add("*IDN?", lambda a: self.idn)
        self.add("*RST", lambda a: self.reset())
        self.add("*CLS", lambda a: self.clear_status())
        self.add("*OPC?", lambda a: "1")
        self.add("*OPC", lambda a: None)
        self.add("*WAI", lambda a: None)
        self.add("*ESR?", lambda a: self._read_esr())
        self.add(error_header, lambda a: self.next_error())
        self.add("SYSTem:ERRor:COUNt?", lambda a: str(len(self.errors)))

    # -- registration ---------------------------------------------------------------------
    def add(self, pattern: str, handler: Handler) -> None:
        is_query = pattern.endswith("?")
        self._commands.append((_parse_pattern(pattern), is_query, handler))

    # -- status -------------------------------------------------------------------------
    def push_error(self, code: int, detail: str = "") -> None:
        message = ERRORS.get(code, "Error")
        if detail:
            message = f"{message}; {detail}"
        if len(self.errors) >= QUEUE_DEPTH:
            self.errors[-1] = (-350, ERRORS[-350])
        else:
            self.errors.append((code, message))
        # IEEE 488.2 11.5.1: command errors set CME (bit 5), execution errors EXE (bit 4),
        # device-dependent DDE (bit 3), query errors QYE (bit 2).
        if -199 <= code <= -100:
            self.esr |= 0x20
        elif -299 <= code <= -200:
            self.esr |= 0x10
        elif -399 <= code <= -300:
            self.esr |= 0x08
        elif -499 <= code <= -400:
            self.esr |= 0x04

    def next_error(self) -> str:
        code, message = self.errors.popleft() if self.errors else (0, ERRORS[0])
        return f'{code},"{message}"'

    def _read_esr(self) -> str:
        value, self.esr = self.esr, 0
        return str(value)

    def clear_status(self) -> None:
        self.errors.clear()
        self.esr = 0

    def reset(self) -> None:
        """*RST: back to the power-on settings (subclasses extend)."""

    # -- execution ------------------------------------------------------------------------
    def execute(self, message: str) -> str | None:
        """Run one program message; return the response message, or None if it had no query."""
        responses: list[str] = []
        path: list[str] = []
        for raw in split_outside_quotes(message.strip(), ";"):
            unit = raw.strip()
            if not unit:
                continue
            header, _, params = unit.partition(" ")
            header = header.strip()
            is_query = header.endswith("?")
            bare = header.rstrip("?")
            if bare.startswith("*"):
                tokens, relative = [bare], False
            else:
                relative = not bare.startswith(":")
                tokens = [t for t in bare.lstrip(":").split(":")]
                if any(not t or not re.fullmatch(r"[A-Za-z][A-Za-z0-9]*", t) for t in tokens):
                    self.push_error(-102, f"bad header {header!r}")
                    continue
            handler = self._find(path + tokens, is_query) if relative and path else None
            if handler is None:
                handler = self._find(tokens, is_query)
            elif relative:
                tokens = path + tokens
            if handler is None:
                self.push_error(-113, header)
                continue
            if not bare.startswith("*"):
                path = tokens[:-1]
            args = [a.strip() for a in split_outside_quotes(params, ",")] if params.strip() else []
            try:
                reply = handler(args)
            except ScpiCommandError as exc:
                self.push_error(exc.code, exc.detail)
                continue
            if is_query and reply is not None:
                responses.append(reply)
        return ";".join(responses) if responses else None

    def _find(self, tokens: list[str], is_query: bool) -> Handler | None:
        for nodes, q, handler in self._commands:
            if q == is_query and _match(nodes, tokens):
                return handler
        return None


def one_arg(args: list[str]) -> str:
    if not args:
        raise ScpiCommandError(-109)
    if len(args) > 1:
        raise ScpiCommandError(-108)
    return args[0]
