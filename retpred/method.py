"""The chromatographic method: typed dataclasses and the TOML method-file reader.

All quantities carry their unit in the name. Percentages stay percentages at this boundary;
the gradient engine works with volume fractions (``phi``, 0-1).
"""

from __future__ import annotations

import difflib
import math
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from retpred.errors import MethodError

ORGANIC_SOLVENTS = ("acetonitrile", "methanol")
PHASE_CLASSES = ("C18", "C8", "phenyl", "polar-embedded", "CN")

# Typical dwell volumes used when the method file gives none (common practice:
# about 0.1-0.5 mL on UHPLC systems, 0.5-2 mL on conventional HPLC;
# ../shared/design/retention-physics.md section 1).
DEFAULT_DWELL_UHPLC_ML = 0.2
DEFAULT_DWELL_HPLC_ML = 1.0
# Assumed pH when the method file gives none: 0.1 % formic acid in water, about pH 2.7
# (common practice).
DEFAULT_PH = 2.7
DEFAULT_TEMPERATURE_C = 30.0
# Pump pressure ratings (common practice): conventional HPLC about 400 bar,
# UHPLC about 1000-1300 bar.
DEFAULT_MAX_PRESSURE_HPLC_BAR = 400.0
DEFAULT_MAX_PRESSURE_UHPLC_BAR = 1000.0


@dataclass(frozen=True)
class HsmParameters:
    """Hydrophobic-subtraction column parameters (Snyder, Dolan and Carr).

    ``H`` hydrophobicity, ``S`` steric selectivity S*, ``A`` column H-bond acidity,
    ``B`` column H-bond basicity, ``C28``/``C70`` cation-exchange capacity at pH 2.8 and
    7.0, ``kEB`` retention factor of ethylbenzene on the test conditions.
    """

    H: float
    S: float
    A: float
    B: float
    C28: float
    C70: float
    kEB: float

    def c_at_ph(self, ph: float) -> float:
        """Cation-exchange term at ``ph``: linear between C(2.8) and C(7.0), held outside."""
        frac = min(max((ph - 2.8) / (7.0 - 2.8), 0.0), 1.0)
        return self.C28 + frac * (self.C70 - self.C28)


@dataclass(frozen=True)
class Column:
    phase: str
    length_mm: float
    inner_diameter_mm: float
    particle_um: float
    dead_time_min: float | None = None
    hsm: HsmParameters | None = None
    ph_min: float = 2.0
    ph_max: float = 8.0


@dataclass(frozen=True)
class MobilePhase:
    organic: str = "acetonitrile"
    a_organic_percent: float = 0.0
    b_organic_percent: float = 100.0
    ph: float | None = None
    temperature_c: float | None = None


@dataclass(frozen=True)
class Gradient:
    """Pump program: rows of (time_min, percent_b, flow_ml_min), times increasing from 0
    (two rows at the same time make a step).

    Linear between rows; an isocratic method is a single row. The flow of a row defaults to
    ``flow_ml_min``.
    """

    flow_ml_min: float
    program: tuple[tuple[float, float, float], ...]
    dwell_volume_ml: float | None = None


@dataclass(frozen=True)
class Instrument:
    max_pressure_bar: float | None = None


@dataclass(frozen=True)
class Method:
    column: Column
    mobile_phase: MobilePhase
    gradient: Gradient
    instrument: Instrument = field(default_factory=Instrument)
    source: str = "<method>"
    warnings: tuple[str, ...] = ()

    @property
    def ph(self) -> float:
        return DEFAULT_PH if self.mobile_phase.ph is None else self.mobile_phase.ph

    @property
    def temperature_c(self) -> float:
        t = self.mobile_phase.temperature_c
        return DEFAULT_TEMPERATURE_C if t is None else t

    @property
    def is_uhplc(self) -> bool:
        """Sub-2-um particles or narrow-bore columns: a UHPLC system (common practice)."""
        return self.column.particle_um < 2.0 or self.column.inner_diameter_mm <= 2.1

    @property
    def dwell_volume_ml(self) -> float:
        if self.gradient.dwell_volume_ml is not None:
            return self.gradient.dwell_volume_ml
        return DEFAULT_DWELL_UHPLC_ML if self.is_uhplc else DEFAULT_DWELL_HPLC_ML

    @property
    def max_pressure_bar(self) -> float:
        if self.instrument.max_pressure_bar is not None:
            return self.instrument.max_pressure_bar
        return DEFAULT_MAX_PRESSURE_UHPLC_BAR if self.is_uhplc else DEFAULT_MAX_PRESSURE_HPLC_BAR

    def phi_program(self) -> tuple[list[float], list[float], list[float]]:
        """(time_min, phi organic fraction 0-1, flow_ml_min) of the pump program."""
        a = self.mobile_phase.a_organic_percent
        b = self.mobile_phase.b_organic_percent
        times = [row[0] for row in self.gradient.program]
        phis = [(a + (b - a) * row[1] / 100.0) / 100.0 for row in self.gradient.program]
        flows = [row[2] for row in self.gradient.program]
        return times, phis, flows


# ---------------------------------------------------------------------------------------------
# Method-file reader
# ---------------------------------------------------------------------------------------------

# Plausibility limits for an analytical reversed-phase column (common practice): columns are
# about 20-300 mm long, 0.1 mm (capillary) to about 50 mm (preparative) wide, packed with
# 1-10 um particles; the limits below leave room on both sides.
COLUMN_LENGTH_RANGE_MM = (10.0, 500.0)
INNER_DIAMETER_RANGE_MM = (0.1, 50.0)
PARTICLE_RANGE_UM = (0.5, 20.0)
# pH scale of dilute aqueous solutions (common practice: 0-14).
PH_SCALE = (0.0, 14.0)
# Liquid water at 1 atm: 0-100 C (handbook). Usual column ovens 5-90 C; many silica columns are
# rated to about 60 C (common practice).
TEMPERATURE_PHYSICAL_C = (0.0, 100.0)
TEMPERATURE_USUAL_C = (5.0, 90.0)
TEMPERATURE_SILICA_LIMIT_C = 60.0
MAX_METHOD_FILE_BYTES = 1_000_000

HSM_KEYS = ("H", "S", "A", "B", "C28", "C70", "kEB")

_SCHEMA: dict[str, tuple[str, ...]] = {
    "column": (
        "phase", "length_mm", "inner_diameter_mm", "particle_um", "dead_time_min",
        "ph_min", "ph_max", "hsm",
    ),
    "mobile_phase": ("organic", "a_organic_percent", "b_organic_percent", "ph", "temperature_c"),
    "gradient": ("flow_ml_min", "dwell_volume_ml", "program"),
    "instrument": ("max_pressure_bar",),
}

# Accepted spellings (lower case, spaces and underscores read as '-') -> built-in class.
_PHASE_ALIASES = {
    **{p.lower(): p for p in PHASE_CLASSES},
    "ods": "C18", "octadecyl": "C18", "octyl": "C8",
    "ep": "polar-embedded", "embedded-polar": "polar-embedded",
    "cyano": "CN", "cyanopropyl": "CN",
}
_ORGANIC_ALIASES = {
    "acetonitrile": "acetonitrile", "acn": "acetonitrile", "mecn": "acetonitrile",
    "methanol": "methanol", "meoh": "methanol",
}

_TOML_LINE_RE = re.compile(r"^(?P<msg>.*?)\s*\(at line (?P<line>\d+), column (?P<col>\d+)\)\s*$")
_HEADER_RE = re.compile(r"^\s*\[\s*([A-Za-z0-9_.\-]+)\s*\]\s*(#.*)?$")


class _Reader:
    """Validation context: the source name, its text (for line numbers) and collected warnings."""

    def __init__(self, source: str, text: str | None) -> None:
        self.source = source
        self.lines = text.splitlines() if text else []
        self.warnings: list[str] = []

    # -- errors -------------------------------------------------------------------------------
    def line_of(self, dotted: str) -> int | None:
        """Best-effort 1-based line of ``section.key`` in the TOML text (None when not found)."""
        if not self.lines:
            return None
        parts = re.sub(r"\[\d+\]", "", dotted).split(".")
        table, key = ".".join(parts[:-1]), parts[-1]
        current = ""
        headers: dict[str, int] = {}
        for number, raw in enumerate(self.lines, start=1):
            m = _HEADER_RE.match(raw)
            if m:
                current = m.group(1)
                headers.setdefault(current, number)
                continue
            if current == table and re.match(rf"^\s*{re.escape(key)}\s*=", raw):
                return number
        return headers.get(dotted, headers.get(table or key))

    def error(self, message: str, dotted: str | None) -> MethodError:
        line = self.line_of(dotted) if dotted else None
        return MethodError(message, path=self.source, line=line, field=dotted)

    # -- typed getters ------------------------------------------------------------------------
    def table(self, data: Mapping, name: str, dotted: str) -> Mapping | None:
        value = data.get(name)
        if value is None:
            return None
        if not isinstance(value, Mapping):
            raise self.error(f"[{dotted}] must be a table, got {_kind(value)}", dotted)
        return value

    def check_keys(self, data: Mapping, allowed: tuple[str, ...], where: str) -> None:
        for key in data:
            if key in allowed:
                continue
            dotted = f"{where}.{key}" if where else str(key)
            hint = _suggest(str(key), allowed)
            if not where:
                home = [s for s, keys in _SCHEMA.items() if key in keys]
                if home:
                    hint = f"; '{key}' belongs in the [{home[0]}] table"
            label = f"table [{key}]" if not where else f"key '{key}' in [{where}]"
            raise self.error(f"unknown {label}{hint}", dotted)

    def number(self, data: Mapping, key: str, where: str, *, required: bool = False,
               default: float | None = None) -> float | None:
        dotted = f"{where}.{key}"
        if key not in data:
            if required:
                raise self.error(f"missing required key '{key}' in [{where}]", dotted)
            return default
        return self.as_number(data[key], dotted)

    def as_number(self, value: Any, dotted: str) -> float:
        if isinstance(value, bool) or not isinstance(value, int | float):
            hint = ""
            if isinstance(value, str):
                try:
                    float(value.strip().replace(",", "."))
                    hint = " (write it without quotes)"
                except ValueError:
                    pass
            raise self.error(f"expected a number, got {_kind(value)}{hint}", dotted)
        number = float(value)
        if not math.isfinite(number):
            raise self.error(f"expected a finite number, got {value}", dotted)
        return number

    def string(self, data: Mapping, key: str, where: str, *, required: bool) -> str | None:
        dotted = f"{where}.{key}"
        if key not in data:
            if required:
                raise self.error(f"missing required key '{key}' in [{where}]", dotted)
            return None
        value = data[key]
        if not isinstance(value, str):
            raise self.error(f"expected a text value in quotes, got {_kind(value)}", dotted)
        return value

    def in_range(self, value: float, lo: float, hi: float, dotted: str, what: str,
                 unit: str = "", why: str = "") -> None:
        if not lo <= value <= hi:
            u = f" {unit}" if unit else ""
            raise self.error(
                f"{what} {value:g}{u} is outside {lo:g}-{hi:g}{u}{why}", dotted)

    def positive(self, value: float, dotted: str, what: str, unit: str) -> None:
        if value <= 0:
            raise self.error(f"{what} must be > 0 {unit}, got {value:g}", dotted)


def _kind(value: Any) -> str:
    if isinstance(value, bool):
        return f"boolean {str(value).lower()}"
    if isinstance(value, str):
        shown = value if len(value) <= 40 else value[:37] + "..."
        return f"text '{shown}'"
    if isinstance(value, Mapping):
        return "a table"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, int | float):
        return f"number {value}"
    return type(value).__name__


def _suggest(key: str, allowed: tuple[str, ...] | list[str]) -> str:
    lowered = {a.lower(): a for a in allowed}
    if key.lower() in lowered:
        return f"; did you mean '{lowered[key.lower()]}'?"
    close = difflib.get_close_matches(key, list(allowed), n=1, cutoff=0.6)
    if close:
        return f"; did you mean '{close[0]}'?"
    return f"; expected one of: {', '.join(allowed)}"


def _canonical(name: str, aliases: dict[str, str]) -> str | None:
    key = re.sub(r"[\s_]+", "-", name.strip().lower())
    return aliases.get(key)


def _parse_hsm(r: _Reader, data: Mapping) -> HsmParameters:
    where = "column.hsm"
    r.check_keys(data, HSM_KEYS, where)
    missing = [k for k in HSM_KEYS if k not in data]
    if missing:
        raise r.error(f"[column.hsm] needs all seven keys {', '.join(HSM_KEYS)}; "
                      f"missing {', '.join(missing)}", where)
    values = {k: r.as_number(data[k], f"{where}.{k}") for k in HSM_KEYS}
    r.positive(values["kEB"], f"{where}.kEB", "kEB (ethylbenzene retention factor)", "")
    return HsmParameters(**values)


def _parse_column(r: _Reader, data: Mapping) -> Column:
    w = "column"
    r.check_keys(data, _SCHEMA[w], w)
    raw_phase = r.string(data, "phase", w, required=True)
    phase = _canonical(raw_phase, _PHASE_ALIASES)
    if phase is None:
        raise r.error(
            f"unknown phase '{raw_phase}'; built-in classes: {', '.join(PHASE_CLASSES)} "
            "(or give the column's own parameters in [column.hsm] with the closest class)",
            "column.phase")
    geometry = {}
    for key, what, unit, (lo, hi) in (
        ("length_mm", "column length", "mm", COLUMN_LENGTH_RANGE_MM),
        ("inner_diameter_mm", "inner diameter", "mm", INNER_DIAMETER_RANGE_MM),
        ("particle_um", "particle size", "um", PARTICLE_RANGE_UM),
    ):
        value = r.number(data, key, w, required=True)
        r.positive(value, f"{w}.{key}", what, unit)
        r.in_range(value, lo, hi, f"{w}.{key}", f"implausible {what}", unit,
                   " (common practice for HPLC/UHPLC columns)")
        geometry[key] = value
    dead_time = r.number(data, "dead_time_min", w)
    if dead_time is not None:
        r.positive(dead_time, f"{w}.dead_time_min", "dead time", "min")
    ph_min = r.number(data, "ph_min", w, default=Column.ph_min)
    ph_max = r.number(data, "ph_max", w, default=Column.ph_max)
    r.in_range(ph_min, *PH_SCALE, f"{w}.ph_min", "ph_min")
    r.in_range(ph_max, *PH_SCALE, f"{w}.ph_max", "ph_max")
    if ph_min >= ph_max:
        raise r.error(f"ph_min {ph_min:g} must be below ph_max {ph_max:g}", f"{w}.ph_min")
    hsm_table = r.table(data, "hsm", "column.hsm")
    hsm = None if hsm_table is None else _parse_hsm(r, hsm_table)
    return Column(phase=phase, dead_time_min=dead_time, hsm=hsm, ph_min=ph_min, ph_max=ph_max,
                  **geometry)


def _parse_mobile_phase(r: _Reader, data: Mapping, column: Column) -> MobilePhase:
    w = "mobile_phase"
    r.check_keys(data, _SCHEMA[w], w)
    raw = r.string(data, "organic", w, required=True)
    organic = _canonical(raw, _ORGANIC_ALIASES)
    if organic is None:
        raise r.error(f"unknown organic solvent '{raw}'; use one of: "
                      f"{', '.join(ORGANIC_SOLVENTS)} (or acn, meoh)", f"{w}.organic")
    percents = {}
    for key in ("a_organic_percent", "b_organic_percent"):
        value = r.number(data, key, w, default=getattr(MobilePhase, key))
        r.in_range(value, 0.0, 100.0, f"{w}.{key}", key.replace("_", " "), "%")
        percents[key] = value
    if percents["a_organic_percent"] == percents["b_organic_percent"]:
        r.warnings.append("eluents A and B have the same organic content: %B has no effect")
    ph = r.number(data, "ph", w)
    if ph is None:
        r.warnings.append(f"no mobile_phase.ph: assuming pH {DEFAULT_PH:g} "
                          "(0.1 % formic acid, common practice)")
    else:
        r.in_range(ph, *PH_SCALE, f"{w}.ph", "pH", why=" (aqueous pH scale)")
        if not column.ph_min <= ph <= column.ph_max:
            r.warnings.append(f"pH {ph:g} is outside the column's usable range "
                              f"{column.ph_min:g}-{column.ph_max:g}")
    temperature = r.number(data, "temperature_c", w)
    if temperature is None:
        r.warnings.append(f"no mobile_phase.temperature_c: assuming {DEFAULT_TEMPERATURE_C:g} C")
    else:
        lo, hi = TEMPERATURE_PHYSICAL_C
        r.in_range(temperature, lo, hi, f"{w}.temperature_c", "temperature", "C",
                   " (liquid water at normal pressure)")
        if not TEMPERATURE_USUAL_C[0] <= temperature <= TEMPERATURE_USUAL_C[1]:
            r.warnings.append(
                f"temperature {temperature:g} C is outside the usual "
                f"{TEMPERATURE_USUAL_C[0]:g}-{TEMPERATURE_USUAL_C[1]:g} C; predictions extrapolate")
        elif temperature > TEMPERATURE_SILICA_LIMIT_C:
            r.warnings.append(f"temperature {temperature:g} C: check the column is rated above "
                              f"{TEMPERATURE_SILICA_LIMIT_C:g} C")
    return MobilePhase(organic=organic, ph=ph, temperature_c=temperature, **percents)


def _parse_program(r: _Reader, value: Any, flow_ml_min: float | None
                   ) -> tuple[tuple[float, float, float], ...]:
    dotted = "gradient.program"
    if not isinstance(value, list):
        raise r.error(f"program must be a list of [time_min, percent_b] rows, got {_kind(value)}",
                      dotted)
    if not value:
        raise r.error("program is empty; give at least one [time_min, percent_b] row", dotted)
    rows = []
    for i, row in enumerate(value):
        where = f"{dotted}[{i}]"
        if not isinstance(row, list) or len(row) not in (2, 3):
            raise r.error(
                f"each row must be [time_min, percent_b] or [time_min, percent_b, flow_ml_min], "
                f"got {_kind(row) if not isinstance(row, list) else f'{len(row)} values'}", where)
        time_min = r.as_number(row[0], f"{where}[0]")
        percent_b = r.as_number(row[1], f"{where}[1]")
        if i == 0 and time_min != 0.0:
            raise r.error(f"the program must start at time 0, got {time_min:g} min", where)
        if i > 0 and time_min < rows[-1][0]:
            raise r.error(f"times must increase: {time_min:g} min follows "
                          f"{rows[-1][0]:g} min", where)
        if i > 1 and time_min == rows[-1][0] == rows[-2][0]:
            raise r.error(f"three rows at {time_min:g} min; two rows at one time make a step, "
                          "more are ambiguous", where)
        r.in_range(percent_b, 0.0, 100.0, f"{where}[1]", "%B", "%")
        if len(row) == 3:
            flow = r.as_number(row[2], f"{where}[2]")
            r.positive(flow, f"{where}[2]", "flow", "mL/min")
        elif flow_ml_min is None:
            raise r.error("row gives no flow and [gradient] has no flow_ml_min", where)
        else:
            flow = flow_ml_min
        rows.append((time_min, percent_b, flow))
    return tuple(rows)


def _parse_gradient(r: _Reader, data: Mapping) -> Gradient:
    w = "gradient"
    r.check_keys(data, _SCHEMA[w], w)
    flow = r.number(data, "flow_ml_min", w)
    if flow is not None:
        r.positive(flow, f"{w}.flow_ml_min", "flow", "mL/min")
    if "program" not in data:
        raise r.error("missing required key 'program' in [gradient] "
                      "(rows of [time_min, percent_b])", f"{w}.program")
    program = _parse_program(r, data["program"], flow)
    if flow is None:
        flow = program[0][2]
    dwell = r.number(data, "dwell_volume_ml", w)
    if dwell is not None and dwell < 0:
        raise r.error(f"dwell volume must be >= 0 mL, got {dwell:g}", f"{w}.dwell_volume_ml")
    return Gradient(flow_ml_min=flow, program=program, dwell_volume_ml=dwell)


def _parse_instrument(r: _Reader, data: Mapping | None) -> Instrument:
    if data is None:
        return Instrument()
    w = "instrument"
    r.check_keys(data, _SCHEMA[w], w)
    pressure = r.number(data, "max_pressure_bar", w)
    if pressure is not None:
        r.positive(pressure, f"{w}.max_pressure_bar", "maximum pressure", "bar")
    return Instrument(max_pressure_bar=pressure)


def parse_method(data: Mapping, source: str = "<method>", *, text: str | None = None) -> Method:
    """Validate a decoded method table (as from ``tomllib``) and build a :class:`Method`.

    ``source`` names the file in messages; ``text`` (the TOML text, optional) lets errors give
    a line number. Raises :class:`MethodError` with ``field`` as a dotted key
    (``gradient.program[2][1]``, indexes 0-based as in the file's list). Missing pH, dwell
    volume and temperature are not errors: the assumed value goes into ``Method.warnings``.
    """
    r = _Reader(str(source), text)
    if not isinstance(data, Mapping):
        raise r.error(f"a method must be a table of sections, got {_kind(data)}", None)
    r.check_keys(data, tuple(_SCHEMA), "")
    sections = {name: r.table(data, name, name) for name in _SCHEMA}
    # Each table is checked on its own and the fault that comes first in the file is
    # reported, so a user fixing faults top to bottom is never sent further down first;
    # a missing table has no line and is reported after faults in the tables present.
    faults: list[MethodError] = []

    def checked(parse, *args):
        if any(a is None for a in args[1:]):
            return None
        try:
            return parse(*args)
        except MethodError as exc:
            faults.append(exc)
            return None

    column = checked(_parse_column, r, sections["column"])
    mobile_phase = checked(_parse_mobile_phase, r, sections["mobile_phase"], column)
    gradient = checked(_parse_gradient, r, sections["gradient"])
    instrument = checked(_parse_instrument, r, sections["instrument"] or {})
    if faults:
        raise min(faults, key=lambda e: (e.line is None, e.line or 0))
    for name in ("column", "mobile_phase", "gradient"):
        if sections[name] is None:
            raise r.error(f"missing required table [{name}]", name)
    method = Method(column=column, mobile_phase=mobile_phase, gradient=gradient,
                    instrument=instrument, source=str(source))
    if gradient.dwell_volume_ml is None:
        kind = "UHPLC" if method.is_uhplc else "HPLC"
        r.warnings.append(f"no gradient.dwell_volume_ml: assuming {method.dwell_volume_ml:g} mL "
                          f"(typical {kind} system, common practice)")
    return Method(column=column, mobile_phase=mobile_phase, gradient=gradient,
                  instrument=instrument, source=str(source), warnings=tuple(r.warnings))


def load_method(path) -> Method:
    """Read and validate a TOML method file (UTF-8, BOM tolerated).

    Raises :class:`MethodError` naming the file (and line/field) for a missing, unreadable,
    non-UTF-8 or syntactically invalid file and for every invalid value.
    """
    source = str(path)
    p = Path(path)
    try:
        if p.is_dir():
            raise MethodError("is a directory, not a method file", path=source)
        with p.open("rb") as fh:
            raw = fh.read(MAX_METHOD_FILE_BYTES + 1)
    except FileNotFoundError:
        raise MethodError("method file not found", path=source) from None
    except OSError as exc:
        raise MethodError(f"cannot read method file: {exc.strerror or exc}", path=source) from None
    if len(raw) > MAX_METHOD_FILE_BYTES:
        raise MethodError(f"too large for a method file (over {MAX_METHOD_FILE_BYTES} bytes)",
                          path=source)
    if raw.startswith(b"\xef\xbb\xbf"):
        raw = raw[3:]
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise MethodError(f"not UTF-8 text (byte 0x{raw[exc.start]:02x}); save the method file "
                          "as UTF-8", path=source, line=line) from None
    if not text.strip():
        raise MethodError("empty method file", path=source)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        m = _TOML_LINE_RE.match(str(exc))
        if m:
            raise MethodError(f"TOML syntax error: {m.group('msg')} (column {m.group('col')})",
                              path=source, line=int(m.group("line"))) from None
        raise MethodError(f"TOML syntax error: {exc}", path=source) from None
    except RecursionError:
        raise MethodError("TOML syntax error: nested too deeply", path=source) from None
    return parse_method(data, source, text=text)


def main_ramp(times: list[float], percents: list[float]) -> tuple[int, int] | None:
    """Indices (start, end) of the first monotone %B change, holds inside it included."""
    start = next((i for i in range(len(percents) - 1) if percents[i + 1] != percents[i]), None)
    if start is None:
        return None
    direction = 1.0 if percents[start + 1] > percents[start] else -1.0
    end = k = start
    while k + 1 < len(percents) and (percents[k + 1] - percents[k]) * direction >= 0:
        k += 1
        if (percents[k] - percents[end]) * direction > 0:
            end = k
    return start, end


def method_summary(method: Method) -> str:
    """One line for people: column, eluent, flow and the main gradient ramp."""
    c, mp, g = method.column, method.mobile_phase, method.gradient
    ph = f"pH {method.ph:g}" + (" (assumed)" if mp.ph is None else "")
    temp = f"{method.temperature_c:g} C" + (" (assumed)" if mp.temperature_c is None else "")
    flows = [row[2] for row in g.program]
    flow = (f"{min(flows):g}-{max(flows):g} mL/min" if min(flows) != max(flows)
            else f"{flows[0]:g} mL/min")
    times = [row[0] for row in g.program]
    percents = [row[1] for row in g.program]
    ramp = main_ramp(times, percents)
    if ramp is None:
        program = f"isocratic {percents[0]:g} %B"
        if times[-1] > 0:
            program += f" for {times[-1]:g} min"
    else:
        i, j = ramp
        program = f"{percents[i]:g}-{percents[j]:g} %B in {times[j] - times[i]:g} min"
    return (f"{c.phase} {c.length_mm:g} x {c.inner_diameter_mm:g} mm, {c.particle_um:g} um; "
            f"{mp.organic}, {ph}, {temp}; {flow}; {program}")


#: Retention conditions count as the same within these (our choice: well inside what a
#: buffer preparation or a column oven holds).
SAME_PH_TOLERANCE = 0.05
SAME_TEMPERATURE_TOLERANCE_C = 0.5


def retention_conditions(method: Method) -> dict[str, Any]:
    """What fixes a solute's ``log kw`` on a method (LSS, retention-physics.md section 2):
    the stationary phase (its class, and its HSM parameters when given), the organic
    modifier, the pH and the temperature. The program, flow, dwell volume and column
    geometry change the times, not ``log kw``, so a correction fitted in retention space
    carries over them."""
    hsm = method.column.hsm
    return {
        "phase": method.column.phase,
        "hsm": None if hsm is None else [getattr(hsm, k) for k in HSM_KEYS],
        "organic": method.mobile_phase.organic,
        "ph": method.ph,
        "temperature_c": method.temperature_c,
    }


def conditions_differ(fitted: Mapping[str, Any], method: Method) -> list[str]:
    """Names of the :func:`retention_conditions` of ``method`` that differ from ``fitted``
    (pH and temperature within 0.05 units and 0.5 C count as equal); keys ``fitted`` lacks
    are not compared."""
    now = retention_conditions(method)
    tol = {"ph": SAME_PH_TOLERANCE, "temperature_c": SAME_TEMPERATURE_TOLERANCE_C}
    out = []
    for key, value in now.items():
        if key not in fitted:
            continue
        old = fitted[key]
        if key in tol and old is not None and value is not None:
            if abs(float(old) - float(value)) > tol[key]:
                out.append(key)
        elif old != value:  # phase, modifier, HSM parameters (a JSON round trip is exact)
            out.append(key)
    return out


def run_key(method: Method) -> str:
    """A short hash of everything that fixes a predicted time on ``method``: its retention
    conditions, column geometry and dead time, eluent compositions, pump program, flow and
    dwell volume. Two method files with equal keys give the same times."""
    import hashlib
    import json

    c, mp, g = method.column, method.mobile_phase, method.gradient
    parts = {
        **retention_conditions(method),
        "geometry": [c.length_mm, c.inner_diameter_mm, c.particle_um, c.dead_time_min],
        "eluents": [mp.a_organic_percent, mp.b_organic_percent],
        "program": [list(row) for row in g.program],
        "dwell_volume_ml": method.dwell_volume_ml,
    }
    text = json.dumps(parts, sort_keys=True, default=float)
    return hashlib.sha256(text.encode()).hexdigest()[:16]
