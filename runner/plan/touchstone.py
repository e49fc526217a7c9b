"""Read two-port Touchstone files (versions 1.1 and 2.0 of the open specification).

Labs keep the measured loss of their cables, pads and couplers as Touchstone files from a
network analyser, so the path correction reads them as written rather than asking for a copy in
another form. Only what a two-port path needs is accepted; anything the reader does not
understand is refused with the file and line, never guessed at (a misread file shifts every
intercept of a night's work).

What is read, per the specifications:
- `!` starts a comment anywhere on a line; keywords, units and formats are case-insensitive.
- The option line `# <unit> <parameter> <format> R <n>`: fields in any order, each optional,
  defaults GHz, S, MA, R 50. Only S parameters are accepted (a path loss is |S21|). In 1.1 only
  the first option line counts; 2.0 allows one.
- Formats RI (real, imaginary), MA (magnitude, angle in degrees), DB (20 log10 |S|, angle).
- 1.1: a two-port's values per frequency are N11 N21 N12 N22; noise parameters, if any, follow
  the network data and start at a frequency not above the previous one; they are skipped.
- 2.0: `[Version] 2.0` first; `[Number of Ports] 2`, `[Two-Port Data Order] 12_21|21_12` and
  `[Number of Frequencies]` required; `[Reference]`, `[Matrix Format] Full|Lower|Upper`,
  `[Number of Noise Frequencies]`, `[Begin Information]`..`[End Information]`,
  `[Network Data]`, `[Noise Data]` (skipped) and `[End]` understood.
"""

from __future__ import annotations

import cmath
import math
import re
from dataclasses import dataclass
from pathlib import PurePath

from nightbench.drivers.errors import InputError

UNITS = {"hz": 1.0, "khz": 1e3, "mhz": 1e6, "ghz": 1e9}
PARAMETERS = ("s", "y", "z", "h", "g")
FORMATS = ("ri", "ma", "db")
_NUMBER = re.compile(r"^[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?$")
_KEYWORD = re.compile(r"^\[([^\]]*)\]\s*(.*)$")


@dataclass(frozen=True)
class Touchstone:
    """A two-port file's network data; `s` holds (S11, S21, S12, S22) per frequency."""

    name: str
    version: str
    frequency_unit: str
    data_format: str
    reference_ohm: tuple[float, ...]
    frequency_hz: tuple[float, ...]
    s: tuple[tuple[complex, complex, complex, complex], ...]
    lines: tuple[int, ...]  # the line each frequency's data starts on, for messages

    def loss_db(self) -> list[float]:
        """-20 log10 |S21| per frequency (positive = loss); a zero |S21| is no usable path."""
        out = []
        for f, s, line in zip(self.frequency_hz, self.s, self.lines):
            mag = abs(s[1])
            if mag == 0.0:
                raise InputError(
                    f"|S21| is zero at {f:g} Hz: the path passes no signal there", file=self.name, line=line
                )
            out.append(-20.0 * math.log10(mag))
        return out


@dataclass(frozen=True)
class _Options:
    unit: str = "ghz"
    parameter: str = "s"
    data_format: str = "ma"
    reference_ohm: float = 50.0


class _Reader:
    """Walks the text once; every failure is an InputError naming this file and line."""

    def __init__(self, text: str, name: str) -> None:
        self.name = name
        self.rows: list[tuple[int, str]] = []
        for number, raw in enumerate(text.splitlines(), start=1):
            content = raw.split("!", 1)[0].strip()
            if content:
                self.rows.append((number, content))

    def fail(self, message: str, line: int | None) -> InputError:
        return InputError(message, file=self.name, line=line)

    def numbers(self, line: int, text: str) -> list[float]:
        values = []
        for token in text.split():
            if not _NUMBER.match(token):
                raise self.fail(f"'{token}' is not a number", line)
            value = float(token)
            if not math.isfinite(value):
                raise self.fail(f"'{token}' is not a finite number", line)
            values.append(value)
        return values

    def options(self, line: int, text: str) -> _Options:
        tokens = text[1:].lower().split()
        unit, parameter, data_format, reference = _Options.unit, _Options.parameter, _Options.data_format, 50.0
        i = 0
        while i < len(tokens):
            token = tokens[i]
            if token in UNITS:
                unit = token
            elif token in PARAMETERS:
                parameter = token
            elif token in FORMATS:
                data_format = token
            elif token == "r":
                if i + 1 >= len(tokens) or not _NUMBER.match(tokens[i + 1]):
                    raise self.fail("the option line's R must be followed by a reference resistance in ohms", line)
                reference = float(tokens[i + 1])
                i += 1
            else:
                raise self.fail(
                    f"unknown option '{token}' (units Hz/kHz/MHz/GHz, parameter S, format RI/MA/DB, R <ohms>)", line
                )
            i += 1
        if parameter != "s":
            raise self.fail(
                f"the file holds {parameter.upper()} parameters; a path loss needs S parameters (|S21|)", line
            )
        return _Options(unit, parameter, data_format, reference)

    def pair(self, a: float, b: float, data_format: str) -> complex:
        if data_format == "ri":
            return complex(a, b)
        magnitude = a if data_format == "ma" else 10.0 ** (a / 20.0)
        return cmath.rect(magnitude, math.radians(b))


def _ports_from_name(name: str) -> int | None:
    match = re.fullmatch(r"\.s(\d+)p", PurePath(name).suffix.lower())
    return int(match.group(1)) if match else None


def parse_touchstone(text: str, name: str) -> Touchstone:
    """Parse a two-port Touchstone 1.1 or 2.0 text; `name` is what messages call the file."""
    reader = _Reader(text, name)
    if not reader.rows:
        raise reader.fail("the file holds no Touchstone data", None)
    first_line, first = reader.rows[0]
    keyword = _KEYWORD.match(first)
    if keyword and keyword.group(1).strip().lower() == "version":
        return _parse_v2(reader)
    if first.startswith("["):
        raise reader.fail("a Touchstone 2.0 file must start with [Version] 2.0", first_line)
    ports = _ports_from_name(name)
    if ports is not None and ports != 2:
        raise reader.fail(f"the name says {ports} ports; a path needs a two-port file (.s2p)", None)
    return _parse_v1(reader)


def _parse_v1(reader: _Reader) -> Touchstone:
    options: _Options | None = None
    tokens: list[tuple[int, float]] = []
    noise_from: int | None = None
    for line, content in reader.rows:
        if content.startswith("#"):
            if options is None:
                options = reader.options(line, content)
            continue  # 1.1: option lines after the first are ignored
        if content.startswith("["):
            raise reader.fail(
                "keywords in [brackets] belong to Touchstone 2.0; the file must start with [Version] 2.0", line
            )
        if options is None:
            raise reader.fail("data before the option line (# <unit> S <format> R <ohms>)", line)
        values = reader.numbers(line, content)
        if len(tokens) % 9 == 0 and tokens and len(values) == 5:
            last_f = tokens[-9][1]
            if values[0] <= last_f:
                noise_from = line  # 1.1 two-port noise parameters: skipped
                break
        tokens.extend((line, v) for v in values)
    if options is None:
        raise reader.fail("no option line (# <unit> S <format> R <ohms>)", None)
    if noise_from is not None:
        for line, content in reader.rows:
            if line > noise_from and not content.startswith("#") and len(reader.numbers(line, content)) != 5:
                raise reader.fail("noise parameter lines hold 5 values each", line)
    return _build(reader, "1.1", options, (options.reference_ohm,) * 2, tokens, "21_12", "full")


def _parse_v2(reader: _Reader) -> Touchstone:
    walk = _V2Walk(reader)
    walk.walk()
    return walk.result()


V2_SECTIONS = {"begin information": "information", "network data": "network", "noise data": "noise"}
V2_HEADER = (
    "number of ports",
    "two-port data order",
    "number of frequencies",
    "number of noise frequencies",
    "matrix format",
)


class _V2Walk:
    """One pass over a Touchstone 2.0 text: the header keywords, the option line, and the numbers
    of each section; `result` then checks what the keywords promised against the data."""

    def __init__(self, reader: _Reader) -> None:
        self.reader = reader
        self.options: _Options | None = None
        self.header: dict[str, tuple[int, str]] = {}
        self.tokens: list[tuple[int, float]] = []
        self.section = "header"
        self.reference: list[float] | None = None

    def walk(self) -> None:
        for index, (line, content) in enumerate(self.reader.rows):
            keyword = _KEYWORD.match(content)
            if self.reference is not None and len(self.reference) < 2 and not keyword:
                self.reference.extend(self.reader.numbers(line, content))  # [Reference] may continue on later lines
                continue
            if self.section == "information":
                if keyword and keyword.group(1).strip().lower() == "end information":
                    self.section = "header"
                continue
            if keyword:
                if index == 0:
                    self._version(line, keyword.group(2).strip())
                elif self._keyword(line, keyword):
                    break
            elif content.startswith("#"):
                self._option_line(line, content)
            else:
                self._data(line, content)

    def _version(self, line: int, rest: str) -> None:
        if rest not in ("2.0",):
            raise self.reader.fail(f"Touchstone version '{rest}' is not supported (1.1 and 2.0 are)", line)

    def _keyword(self, line: int, keyword: re.Match[str]) -> bool:
        """Take in one [keyword]; True at [End]."""
        word, rest = " ".join(keyword.group(1).lower().split()), keyword.group(2).strip()
        if word == "end":
            return True
        if word in V2_SECTIONS:
            self.section = V2_SECTIONS[word]
        elif word == "reference":
            self.reference = self.reader.numbers(line, rest)
        elif word == "mixed-mode order":
            raise self.reader.fail("mixed-mode data is not a single-ended path", line)
        elif word in V2_HEADER:
            if word in self.header:
                raise self.reader.fail(f"[{keyword.group(1)}] is given twice", line)
            self.header[word] = (line, rest)
        else:
            raise self.reader.fail(f"unknown keyword [{keyword.group(1)}]", line)
        return False

    def _option_line(self, line: int, content: str) -> None:
        if self.options is not None:
            raise self.reader.fail("a Touchstone 2.0 file has one option line", line)
        if self.section != "header":
            raise self.reader.fail("the option line must come before [Network Data]", line)
        self.options = self.reader.options(line, content)

    def _data(self, line: int, content: str) -> None:
        if self.section == "network":
            self.tokens.extend((line, v) for v in self.reader.numbers(line, content))
        elif self.section == "noise":
            self.reader.numbers(line, content)  # checked, then skipped
        else:
            raise self.reader.fail("data outside [Network Data]", line)

    def _required(self, word: str) -> tuple[int, str]:
        if word not in self.header:
            raise self.reader.fail(f"a two-port Touchstone 2.0 file needs [{word.title()}]", None)
        return self.header[word]

    def result(self) -> Touchstone:
        reader, options = self.reader, self.options
        if options is None:
            raise reader.fail("no option line (# <unit> S <format> R <ohms>)", None)
        line, ports = self._required("number of ports")
        if ports != "2":
            raise reader.fail(f"[Number of Ports] is {ports}; a path needs a two-port file", line)
        line, order = self._required("two-port data order")
        if order not in ("12_21", "21_12"):
            raise reader.fail("[Two-Port Data Order] must be 12_21 or 21_12", line)
        count_line, count = self._required("number of frequencies")
        line, matrix = self.header.get("matrix format", (0, "full"))
        matrix = matrix.lower()
        if matrix not in ("full", "lower", "upper"):
            raise reader.fail("[Matrix Format] must be Full, Lower or Upper", line)
        if self.reference is not None and len(self.reference) != 2:
            raise reader.fail("[Reference] needs one resistance per port (2)", None)
        references = tuple(self.reference) if self.reference else (options.reference_ohm,) * 2
        result = _build(reader, "2.0", options, references, self.tokens, order, matrix)
        if not count.isdigit() or int(count) != len(result.frequency_hz):
            raise reader.fail(
                f"[Number of Frequencies] says {count} but the file holds {len(result.frequency_hz)}", count_line
            )
        return result


def _build(
    reader: _Reader,
    version: str,
    options: _Options,
    references: tuple[float, ...],
    tokens: list[tuple[int, float]],
    order: str,
    matrix: str,
) -> Touchstone:
    width = 9 if matrix == "full" else 7
    if not tokens:
        raise reader.fail("the file holds no network data", None)
    if len(tokens) % width:
        line = tokens[len(tokens) - len(tokens) % width][0]
        raise reader.fail(
            f"a two-port frequency needs {width} values (frequency and "
            f"{(width - 1) // 2} complex numbers); the data ends part-way through one",
            line,
        )
    scale = UNITS[options.unit]
    freqs: list[float] = []
    matrices: list[tuple[complex, complex, complex, complex]] = []
    lines: list[int] = []
    for start in range(0, len(tokens), width):
        line = tokens[start][0]
        values = [v for _, v in tokens[start : start + width]]
        f = values[0] * scale
        if f < 0 or (freqs and f <= freqs[-1]):
            raise reader.fail("frequencies must be positive and increase from line to line", line)
        n = [reader.pair(values[i], values[i + 1], options.data_format) for i in range(1, width, 2)]
        if matrix == "lower":  # rows of the lower triangle: N11; N21 N22 (symmetric)
            s11, s21, s22 = n
            s12 = s21
        elif matrix == "upper":  # rows of the upper triangle: N11 N12; N22 (symmetric)
            s11, s12, s22 = n
            s21 = s12
        elif order == "21_12":
            s11, s21, s12, s22 = n
        else:
            s11, s12, s21, s22 = n
        freqs.append(f)
        matrices.append((s11, s21, s12, s22))
        lines.append(line)
    return Touchstone(
        reader.name, version, options.unit, options.data_format, references, tuple(freqs), tuple(matrices), tuple(lines)
    )
