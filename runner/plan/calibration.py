"""A level calibration: the measured relation between the source setting and the DUT-plane level.

`nightbench calibrate` (calcli.py, measure/calibrate.py) writes it with a power sensor where the
DUT goes; a plan uses it as its path (`path: {calibration: FILE}`). The file is a CSV

    # nightbench level calibration
    # sensor: <identity>
    # date: <ISO 8601>
    # accuracy_db: 0.12
    frequency_hz,source_dbm,dut_dbm
    900000000,-19.5,-20.37

The relation is kept as a correction c = source - dut (dB) per frequency against the DUT level,
linear between calibrated levels and between calibrated frequencies. Below the lowest calibrated
level the correction at that level is held (the source's attenuator is assumed right there); above
the highest there is no relation: plans asking for more are refused (plan/checks.py), so the
relation is never extrapolated upwards toward the DUT's ceiling. Outside the calibrated
frequencies nothing is guessed either. Like plan/path.py, plain bisection: no numpy in `check`.

The calibration's own scatter (`scatter_db`) is the residual standard deviation of the corrections
about a straight line in level, per frequency (n - 2 degrees of freedom): a source's level error is
smooth in level, the sensor's noise is not, so what the line leaves is the scatter of one
calibration point. It counts any real non-linearity as scatter too, which errs on the safe side.
"""

from __future__ import annotations

import bisect
import itertools
import math
from dataclasses import dataclass

from nightbench.drivers.errors import InputError

HEADER = "frequency_hz,source_dbm,dut_dbm"
MIN_LEVELS = 3  # per frequency: a line and one degree of freedom for the scatter
REL_SLACK = 1e-9  # a frequency this close to the calibrated span's end counts as on it
LEVEL_SLACK_DB = 1e-6


@dataclass(frozen=True)
class Relation:
    """One frequency: DUT levels (strictly increasing) and the corrections source - dut there."""

    dut_dbm: tuple[float, ...]
    correction_db: tuple[float, ...]
    scatter_db: float

    def correction(self, dut_dbm: float) -> float:
        """Linear between calibrated levels; held beyond either end (the top is refused by checks)."""
        levels, corr = self.dut_dbm, self.correction_db
        if dut_dbm <= levels[0]:
            return corr[0]
        if dut_dbm >= levels[-1]:
            return corr[-1]
        i = bisect.bisect_right(levels, dut_dbm)
        d0, d1, c0, c1 = levels[i - 1], levels[i], corr[i - 1], corr[i]
        return c0 + (c1 - c0) * (dut_dbm - d0) / (d1 - d0)


@dataclass(frozen=True)
class Calibration:
    """A parsed calibration file: what the path, the checks and the uncertainty budget ask of it."""

    name: str
    sensor: str
    date: str
    sensor_accuracy_db: float  # the sensor's stated +/- half-width (rectangular)
    frequency_hz: tuple[float, ...]
    relations: tuple[Relation, ...]

    # -- where it applies -------------------------------------------------------------------
    def covers(self, frequency_hz: float) -> bool:
        lo, hi = self.frequency_hz[0], self.frequency_hz[-1]
        return lo * (1 - REL_SLACK) <= frequency_hz <= hi * (1 + REL_SLACK)

    def _neighbours(self, frequency_hz: float) -> list[tuple[Relation, float]]:
        """The relations around a frequency with their linear weights (one, at a calibrated frequency)."""
        if not self.covers(frequency_hz):
            raise ValueError(
                f"{frequency_hz:g} Hz is outside the calibration {self.name} "
                f"({self.frequency_hz[0]:g} to {self.frequency_hz[-1]:g} Hz)"
            )
        freqs = self.frequency_hz
        f = min(max(frequency_hz, freqs[0]), freqs[-1])
        i = bisect.bisect_left(freqs, f)
        if i < len(freqs) and math.isclose(freqs[i], f, rel_tol=REL_SLACK):
            return [(self.relations[i], 1.0)]
        w = (f - freqs[i - 1]) / (freqs[i] - freqs[i - 1])
        return [(self.relations[i - 1], 1.0 - w), (self.relations[i], w)]

    def lowest_dbm(self, frequency_hz: float) -> float:
        """The lowest DUT level calibrated at this frequency (between frequencies: at both)."""
        return max(r.dut_dbm[0] for r, _ in self._neighbours(frequency_hz))

    def highest_dbm(self, frequency_hz: float) -> float:
        """The highest DUT level calibrated at this frequency (between frequencies: at both)."""
        return min(r.dut_dbm[-1] for r, _ in self._neighbours(frequency_hz))

    def scatter_db(self, frequency_hz: float) -> float:
        """Standard uncertainty (dB) of one calibration point from the calibration's own scatter;
        between calibrated frequencies the larger of the two neighbours."""
        return max(r.scatter_db for r, _ in self._neighbours(frequency_hz))

    # -- the relation ------------------------------------------------------------------------
    def correction(self, frequency_hz: float, dut_dbm: float) -> float:
        """source - dut (dB) for a DUT level: linear in level and frequency, held below the lowest level."""
        return sum(w * r.correction(dut_dbm) for r, w in self._neighbours(frequency_hz))

    def source_for(self, frequency_hz: float, dut_dbm: float) -> float:
        """The source setting that puts `dut_dbm` at the DUT."""
        return dut_dbm + self.correction(frequency_hz, dut_dbm)

    def dut_for(self, frequency_hz: float, source_dbm: float) -> float:
        """The DUT level a source setting implies: the inverse of source_for, by bisection.

        source_for is strictly increasing in the DUT level (the file is refused otherwise), so the
        inverse is unique; the upper end of the final bracket is returned, so a rounding error can
        only overstate the DUT level, never understate it (this feeds the ceiling check)."""
        corr = [c for r, _ in self._neighbours(frequency_hz) for c in r.correction_db]
        lo, hi = source_dbm - max(corr) - 1.0, source_dbm - min(corr) + 1.0
        for _ in range(80):
            mid = 0.5 * (lo + hi)
            if self.source_for(frequency_hz, mid) < source_dbm:
                lo = mid
            else:
                hi = mid
            if hi - lo < 1e-9:
                break
        return hi

    def describe(self) -> list[str]:
        lines = [
            f"calibration {self.name}: sensor {self.sensor}, {self.date}, accuracy +/- {self.sensor_accuracy_db:g} dB"
        ]
        for f, r in zip(self.frequency_hz, self.relations):
            lines.append(
                f"  calibrated at {f / 1e6:g} MHz: {r.dut_dbm[0]:g} to {r.dut_dbm[-1]:g} dBm at the DUT, "
                f"{len(r.dut_dbm)} levels, correction {min(r.correction_db):.3f} to {max(r.correction_db):.3f} dB, "
                f"scatter {r.scatter_db:.4f} dB"
            )
        return lines


def residual_sd(x: list[float], y: list[float]) -> float:
    """Residual standard deviation of y about its least-squares line in x (n - 2 degrees of freedom)."""
    n = len(x)
    mx, my = sum(x) / n, sum(y) / n
    sxx = sum((a - mx) ** 2 for a in x)
    sxy = sum((a - mx) * (b - my) for a, b in zip(x, y))
    slope = sxy / sxx
    ss = sum((b - my - slope * (a - mx)) ** 2 for a, b in zip(x, y))
    return math.sqrt(ss / (n - 2))


def _number(text: str, name: str, line: int, key: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise InputError(f"{text.strip()!r} is not a number", file=name, line=line, key=key) from None
    if not math.isfinite(value):
        raise InputError("must be a finite number", file=name, line=line, key=key)
    return value


def parse_calibration(text: str, name: str) -> Calibration:
    """Parse a calibration file; InputError naming the file, line and column/key of the first problem."""
    meta: dict[str, tuple[str, int]] = {}
    rows: dict[float, list[tuple[float, float, int]]] = {}
    header_seen = False
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line:
            continue
        if line.startswith("#"):
            key, sep, value = line[1:].partition(":")
            if sep and key.strip() in ("sensor", "date", "accuracy_db"):
                meta[key.strip()] = (value.strip(), number)
            continue
        if not header_seen:
            if line.replace(" ", "") != HEADER:
                raise InputError(f"the first row must be the header '{HEADER}'", file=name, line=number)
            header_seen = True
            continue
        cells = line.split(",")
        if len(cells) != 3:
            raise InputError(f"a row has 3 values ({HEADER}); this one has {len(cells)}", file=name, line=number)
        f, src, dut = (_number(c, name, number, k) for c, k in zip(cells, HEADER.split(",")))
        if f <= 0:
            raise InputError("frequencies must be positive", file=name, line=number, key="frequency_hz")
        rows.setdefault(f, []).append((src, dut, number))
    if "accuracy_db" not in meta:
        raise InputError("missing the '# accuracy_db: <dB>' line (the sensor's stated accuracy)", file=name, line=1)
    acc_text, acc_line = meta["accuracy_db"]
    accuracy = _number(acc_text, name, acc_line, "accuracy_db")
    if accuracy < 0:
        raise InputError("must not be negative", file=name, line=acc_line, key="accuracy_db")
    if not rows:
        raise InputError(f"no calibration rows (expected '{HEADER}' and rows below it)", file=name, line=1)
    freqs = tuple(sorted(rows))
    return Calibration(
        name=name,
        sensor=meta.get("sensor", ("(not stated)", 0))[0],
        date=meta.get("date", ("(not stated)", 0))[0],
        sensor_accuracy_db=accuracy,
        frequency_hz=freqs,
        relations=tuple(_relation(f, rows[f], name) for f in freqs),
    )


def _relation(f: float, rows: list[tuple[float, float, int]], name: str) -> Relation:
    """One frequency's rows as a relation: at least MIN_LEVELS, the DUT level rising with the setting."""
    rows = sorted(rows)
    if len(rows) < MIN_LEVELS:
        raise InputError(
            f"{f:g} Hz has {len(rows)} levels; a calibration needs at least {MIN_LEVELS} per frequency "
            "(a line and its scatter)",
            file=name,
            line=rows[-1][2],
            key="source_dbm",
        )
    for (s0, d0, n0), (s1, d1, n1) in itertools.pairwise(rows):
        if s1 == s0:
            raise InputError(f"{f:g} Hz: source {s1:g} dBm also on line {n0}", file=name, line=n1, key="source_dbm")
        if d1 <= d0:
            raise InputError(
                f"{f:g} Hz: the DUT level does not rise with the source setting ({d0:g} dBm at {s0:g}, line {n0}; "
                f"{d1:g} dBm at {s1:g})",
                file=name,
                line=n1,
                key="dut_dbm",
            )
    dut = [d for _, d, _ in rows]
    corr = [s - d for s, d, _ in rows]
    return Relation(tuple(dut), tuple(corr), residual_sd(dut, corr))


def format_calibration(
    sensor: str, date: str, accuracy_db: float, rows: list[tuple[float, float, float]], notes: tuple[str, ...] = ()
) -> str:
    """The file's text: comment lines, the header, one row per (frequency, source setting, DUT level)."""
    head = [
        "# nightbench level calibration",
        f"# sensor: {sensor}",
        f"# date: {date}",
        f"# accuracy_db: {accuracy_db:g}",
    ]
    head += [f"# {n}" for n in notes]
    body = [f"{f:.12g},{s:.4f},{d:.4f}" for f, s, d in rows]
    return "\n".join(head + [HEADER] + body) + "\n"
