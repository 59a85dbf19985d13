"""The one loader of bench, cart and template files: parse, validate, cross-check, locate every problem.

Every problem of a file is collected and raised together as a
:class:`~labkit.core.errors.FileValidationError`; each names the file, line,
field path, what was expected and what was found.
"""

from __future__ import annotations

import copy
import datetime
import hashlib
import re
import tomllib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path as FsPath
from typing import Any, Literal

from pydantic import BaseModel, Field, ValidationError

from labkit.core.bench import AlternatorSet, Bench, LinearLoad, MainsReference
from labkit.core.errors import (
    FileValidationError,
    LabkitError,
    LocationError,
    Problem,
    UnitError,
    UnknownNameError,
    did_you_mean,
)
from labkit.core.fields import Name
from labkit.core.locations import parse_location
from labkit.core.quantities import is_registered, quantity
from labkit.core.template import SessionTemplate
from labkit.core.units import KINDS, parse_quantity, unit_factor
from labkit.files.tomlpos import Path, PositionMap, scan_positions
from labkit.files.validation import problems_from_validation_error

MAX_FILE_BYTES = 2_000_000


@dataclass(frozen=True)
class SourceText:
    """A file's text, where it came from, and its content hash."""

    name: str
    text: str

    @property
    def sha256(self) -> str:
        """SHA-256 of the UTF-8 text."""
        return hashlib.sha256(self.text.encode()).hexdigest()


@dataclass(frozen=True)
class LoadedBench:
    """A validated bench with the texts it was built from."""

    bench: Bench
    type_source: SourceText
    cart_source: SourceText | None = None


@dataclass(frozen=True)
class LoadedTemplate:
    """A validated template with its text."""

    template: SessionTemplate
    source: SourceText


# -- reading TOML ----------------------------------------------------------------------------
_TOML_AT = re.compile(r"\(at line (\d+), column (\d+)\)")


def read_text(path: str | FsPath) -> SourceText:
    """Read a file as UTF-8 text, refusing files that are too large or not text."""
    p = FsPath(path)
    try:
        size = p.stat().st_size
        if size > MAX_FILE_BYTES:
            msg = f"{p}: {size} bytes, larger than the {MAX_FILE_BYTES}-byte limit for bench and template files"
            raise FileValidationError([Problem(str(p), 0, (), msg)])
        data = p.read_bytes()
    except OSError as exc:
        raise FileValidationError([Problem(str(p), 0, (), f"cannot read file: {exc.strerror}")]) from exc
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise FileValidationError([Problem(str(p), line, (), "not UTF-8 text", "UTF-8", "invalid byte")]) from exc
    return SourceText(str(p), text)


def parse_toml(source: SourceText) -> tuple[dict[str, Any], PositionMap]:
    """Parse TOML text, with a located error for a syntax problem."""
    try:
        data = tomllib.loads(source.text)
    except tomllib.TOMLDecodeError as exc:
        m = _TOML_AT.search(str(exc))
        line = int(m.group(1)) if m else 0
        reason = _TOML_AT.sub("", str(exc)).strip()
        raise FileValidationError([Problem(source.name, line, (), f"TOML syntax error: {reason}",
                                           code="syntax")]) from exc
    return data, scan_positions(source.text)


def file_kind(data: dict[str, Any]) -> str:
    """``bench``, ``cart`` or ``template``, from the file's top table."""
    for kind in ("bench", "cart", "template"):
        if kind in data:
            return kind
    return "unknown"


# -- validation ---------------------------------------------------------------------------------
def _validate(model: type[BaseModel], data: dict[str, Any], source: SourceText,
              positions: PositionMap) -> tuple[Any, list[Problem]]:
    try:
        return model.model_validate(data), []
    except ValidationError as exc:
        return None, problems_from_validation_error(exc, model, source.name, positions)


class _Collector:
    def __init__(self, file: str, positions: PositionMap) -> None:
        self.file, self.positions, self.problems = file, positions, []

    def add(self, path: Path, message: str, expected: str = "", found: str = "", code: str = "reference") -> None:
        self.problems.append(Problem(self.file, self.positions.line_of(path), path, message, expected, found,
                                     column=self.positions.column_of(path), code=code))


def _check_bench(bench: Bench, col: _Collector) -> None:
    """Cross-references and physical sense of a structurally valid bench."""
    if round(bench.bench.nominal_frequency, 9) not in (50.0, 60.0):
        col.add(("bench", "nominal_frequency"), "nominal frequency must be 50 Hz or 60 Hz",
                "50 Hz or 60 Hz", f"{bench.bench.nominal_frequency:g} Hz", code="physical_range")
    buses = bench.bus_names
    seen: dict[str, Path] = {}

    def unique(name: str, path: Path) -> None:
        if name in seen:
            col.add(path, f'name "{name}" is already used (at line {col.positions.line_of(seen[name])}); '
                    "bus, element and sensor names must be unique across the bench", code="duplicate")
        else:
            seen[name] = path

    for i, b in enumerate(bench.buses):
        unique(b.name, ("buses", i, "name"))
    for table in ("sources", "switches", "line_sections", "line_branches", "loads", "sensors"):
        for i, item in enumerate(getattr(bench, table)):
            unique(item.id, (table, i, "id"))

    def bus_ref(name: str, path: Path) -> None:
        if name not in buses:
            col.add(path, f'no bus "{name}"{did_you_mean(name, buses)}', "a bus from [[buses]]", repr(name))

    for i, s in enumerate(bench.sources):
        bus_ref(s.bus, ("sources", i, "bus"))
        if isinstance(s, AlternatorSet) and not s.field_min <= s.field_default <= s.field_max:
            col.add(("sources", i, "field_default"), "field_default outside field_min..field_max",
                    code="physical_range")
    refs = [s for s in bench.sources if isinstance(s, MainsReference)]
    if len(refs) > 1:
        col.add(("sources", bench.sources.index(refs[1]), "kind"), "a bench has at most one mains_reference")
    for i, sw in enumerate(bench.switches):
        bus_ref(sw.from_bus, ("switches", i, "from_bus"))
        bus_ref(sw.to_bus, ("switches", i, "to_bus"))
        if sw.from_bus == sw.to_bus:
            col.add(("switches", i, "to_bus"), "a switch must join two different buses")
    section_ids = [s.id for s in bench.line_sections]
    used_by: dict[str, str] = {}
    if any(s.full_scale is not None for s in bench.line_sections) and bench.line_scaling is None:
        first = next(i for i, s in enumerate(bench.line_sections) if s.full_scale is not None)
        col.add(("line_sections", first, "full_scale"),
                "a section given as a full-scale line needs a [line_scaling] table with the bases")
    for i, br in enumerate(bench.line_branches):
        bus_ref(br.from_bus, ("line_branches", i, "from_bus"))
        bus_ref(br.to_bus, ("line_branches", i, "to_bus"))
        if br.from_bus == br.to_bus:
            col.add(("line_branches", i, "to_bus"), "a line branch must join two different buses")
        names: list[str] = []
        for j, pos in enumerate(br.positions):
            if pos.name == "open":
                col.add(("line_branches", i, "positions", j, "name"),
                        '"open" is the built-in position with no section connected; choose another name')
            if pos.name in names:
                col.add(("line_branches", i, "positions", j, "name"), f'position "{pos.name}" given twice',
                        code="duplicate")
            names.append(pos.name)
            in_position: set[str] = set()
            for k, path in enumerate(pos.paths):
                if not path:
                    col.add(("line_branches", i, "positions", j, "paths", k), "an empty path",
                            "at least one section id")
                for m, sid in enumerate(path):
                    where = ("line_branches", i, "positions", j, "paths", k, m)
                    if sid not in section_ids:
                        col.add(where, f'no line section "{sid}"{did_you_mean(sid, section_ids)}',
                                "a section from [[line_sections]]", repr(sid))
                        continue
                    if sid in in_position:
                        col.add(where, f'section "{sid}" used twice in one position')
                    in_position.add(sid)
                    if used_by.setdefault(sid, br.id) != br.id:
                        col.add(where, f'section "{sid}" already belongs to line branch "{used_by[sid]}"')
        if br.default_position != "open" and br.default_position not in names:
            col.add(("line_branches", i, "default_position"),
                    f'no position "{br.default_position}"{did_you_mean(br.default_position, names)}',
                    "open or " + ", ".join(names), repr(br.default_position))
    for i, ld in enumerate(bench.loads):
        bus_ref(ld.bus, ("loads", i, "bus"))
    element_ids = bench.element_ids()
    for i, sn in enumerate(bench.sensors):
        if sn.accuracy.resolution > sn.range:
            unit = "V" if sn.kind == "voltage" else "A"
            col.add(("sensors", i, "accuracy", "resolution"), "a resolution coarser than the sensor's range",
                    f"at most the range, {sn.range:g} {unit}", f"{sn.accuracy.resolution:g} {unit}",
                    code="physical_range")
        for j, pl in enumerate(sn.placements):
            where = ("sensors", i, "placements", j)
            try:
                loc = parse_location(pl.location)
            except LocationError as exc:
                col.add((*where, "location"), str(exc), code="location")
                continue
            if sn.kind == "voltage":
                if loc.kind != "node" or loc.name not in buses:
                    col.add((*where, "location"), "a voltage sensor is placed at a bus",
                            "a bus name", repr(pl.location), code="location")
                continue
            if loc.kind != "end":
                col.add((*where, "location"), "a current sensor is placed at an element end",
                        "ELEMENT@BUS", repr(pl.location), code="location")
                continue
            if loc.name not in element_ids:
                col.add((*where, "location"), f'no element "{loc.name}"{did_you_mean(loc.name, element_ids)}',
                        code="location")
                continue
            bus_ref(loc.bus or "", (*where, "location"))
            ends = {loc.name, loc.bus}
            if pl.from_ is None or pl.to is None:
                col.add((*where,), "a current sensor placement needs its reference direction: from and to",
                        f'from = "{loc.bus}", to = "{loc.name}" (or the reverse)', code="direction")
            elif {pl.from_, pl.to} != ends:
                wrong = "to" if pl.from_ in ends and pl.from_ != pl.to else "from"  # point at the key that is off
                col.add((*where, wrong), "from and to must be the bus and the element of the location",
                        f"{loc.bus} and {loc.name}", f"{pl.from_} -> {pl.to}", code="direction")


def element_ends(bench: Bench) -> dict[str, tuple[str, ...]]:
    """The buses each element touches (its ends)."""
    ends: dict[str, tuple[str, ...]] = {}
    for s in bench.sources:
        ends[s.id] = (s.bus,)
    for sw in bench.switches:
        ends[sw.id] = (sw.from_bus, sw.to_bus)
    for br in bench.line_branches:
        ends[br.id] = (br.from_bus, br.to_bus)
    for ld in bench.loads:
        ends[ld.id] = (ld.bus,)
    return ends


# -- cart overrides -------------------------------------------------------------------------
_OVERRIDABLE = ("sources", "switches", "line_sections", "loads")


def _apply_cart(raw: dict[str, Any], cart: dict[str, Any], col: _Collector) -> dict[str, Any]:
    """Merge a cart file's measured values into the bench's raw tables (ids resolved)."""
    merged = copy.deepcopy(raw)
    for table, entries in cart.items():
        if table == "cart":
            continue
        if table not in _OVERRIDABLE:
            col.add((table,), f'unknown table "{table}"{did_you_mean(table, [*_OVERRIDABLE, "cart"])}',
                    "cart, " + ", ".join(_OVERRIDABLE), code="extra_forbidden")
            continue
        if not isinstance(entries, dict):
            col.add((table,), "expected a table of element ids", found=type(entries).__name__)
            continue
        items = merged.get(table, [])
        ids = [str(it.get("id")) for it in items if isinstance(it, dict)]
        for element_id, values in entries.items():
            where: Path = (table, element_id)
            if element_id not in ids:
                col.add(where, f'no element "{element_id}" in {table} of the bench type'
                        f"{did_you_mean(element_id, ids)}")
                continue
            if not isinstance(values, dict):
                col.add(where, "expected a table of measured values", found=type(values).__name__)
                continue
            target = items[ids.index(element_id)]
            for key, value in values.items():
                if key == "id":
                    col.add((*where, key), "the id of an element cannot be overridden")
                elif key == "steps" and isinstance(value, dict) and isinstance(target.get("steps"), list):
                    for step_key, step_values in value.items():
                        n = int(step_key) if str(step_key).isdigit() else -1
                        if not 1 <= n <= len(target["steps"]) or not isinstance(step_values, dict):
                            col.add((*where, "steps", step_key), f"no step {step_key!r}",
                                    f"a step number 1..{len(target['steps'])}")
                            continue
                        target["steps"][n - 1] = {**target["steps"][n - 1], **step_values}
                elif key not in target and key not in _optional_keys(table, target):
                    known = sorted(set(target) | set(_optional_keys(table, target)))
                    col.add((*where, key), f'unknown key "{key}"{did_you_mean(key, known)}',
                            code="extra_forbidden")
                elif isinstance(value, dict) and isinstance(target.get(key), dict):
                    target[key] = {**target[key], **value}
                else:
                    target[key] = value
    return merged


def _optional_keys(table: str, target: dict[str, Any]) -> list[str]:
    from labkit.core import bench as bm

    model: type[BaseModel] = {
        "sources": bm.AlternatorSet if target.get("kind") == "alternator_set" else bm.MainsReference,
        "switches": bm.Switch, "line_sections": bm.LineSection,
        "loads": bm.NonlinearLoad if target.get("kind") == "nonlinear" else bm.LinearLoad,
    }[table]
    return [info.alias or name for name, info in model.model_fields.items()]


class _CartHeader(BaseModel):
    model_config = {"extra": "forbid"}
    labkit_cart: Literal[1]
    id: Name
    bench_type: Name
    measured_on: datetime.date = Field(description="a TOML date or an ISO date string, YYYY-MM-DD")
    meter: str = ""
    note: str = ""


# -- public entry points -------------------------------------------------------------------------
def load_bench(path: str | FsPath, cart: str | FsPath | None = None) -> LoadedBench:
    """Load and validate a bench type file, optionally with one cart's override file.

    Raises
    ------
    FileValidationError
        Every problem found in the file(s), each located.
    """
    source = read_text(path)
    data, positions = parse_toml(source)
    return bench_from_data(source, data, positions, read_text(cart) if cart is not None else None)


def bench_from_data(source: SourceText, data: dict[str, Any], positions: PositionMap,
                    cart_source: SourceText | None = None) -> LoadedBench:
    """Validate parsed bench data (and a cart's text), collecting every problem."""
    problems: list[Problem] = []
    if "bench" not in data:
        problems.append(Problem(source.name, 1, ("bench",), "not a bench file: no [bench] table",
                                "a [bench] table with labkit_bench = 1"))
        raise FileValidationError(problems)
    bench, problems = _validate(Bench, data, source, positions)
    if bench is not None:
        col = _Collector(source.name, positions)
        _check_bench(bench, col)
        problems += col.problems
    if problems:
        raise FileValidationError(problems)
    if cart_source is None:
        return LoadedBench(bench, source)
    cart_data, cart_pos = parse_toml(cart_source)
    col = _Collector(cart_source.name, cart_pos)
    header = cart_data.get("cart")
    if not isinstance(header, dict):
        col.add(("cart",), "not a cart file: no [cart] table", "a [cart] table with labkit_cart = 1")
        raise FileValidationError(col.problems)
    try:
        info = _CartHeader.model_validate(header)
    except ValidationError as exc:
        raise FileValidationError(problems_from_validation_error(exc, _CartHeader, cart_source.name, cart_pos,
                                                                 prefix=("cart",))) from exc
    if info.bench_type != bench.bench.id:
        col.add(("cart", "bench_type"), "the cart belongs to another bench type", repr(bench.bench.id),
                repr(info.bench_type))
    merged = _apply_cart(data, cart_data, col)
    if col.problems:
        raise FileValidationError(col.problems)
    merged["cart"] = {"id": info.id, "bench_type": info.bench_type, "measured_on": str(info.measured_on),
                      "meter": info.meter, "note": info.note}
    try:
        specialized = Bench.model_validate(merged)
    except ValidationError as exc:
        # values that came from the cart file are reported there; the rest in the bench file
        raise FileValidationError(_relocate(problems_from_validation_error(exc, Bench, source.name, positions),
                                            merged, cart_source.name, cart_pos)) from exc
    col2 = _Collector(source.name, positions)
    _check_bench(specialized, col2)
    if col2.problems:
        raise FileValidationError(_relocate(col2.problems, merged, cart_source.name, cart_pos))
    return LoadedBench(specialized, source, cart_source)


def _relocate(problems: list[Problem], merged: dict[str, Any], cart_name: str, cart_pos: PositionMap) -> list[Problem]:
    """Report problems caused by a cart's values in the cart file, at the cart's path; the rest stay in the bench."""
    located = []
    for p in problems:
        cart_path = _cart_path_of(p.path, merged)
        if cart_path is not None and cart_pos.line_of(cart_path):
            located.append(Problem(cart_name, cart_pos.line_of(cart_path), cart_path, p.message, p.expected, p.found,
                                   column=cart_pos.column_of(cart_path), code=p.code))
        else:
            located.append(p)
    return located


def _cart_path_of(bench_path: Path, merged: dict[str, Any]) -> Path | None:
    if len(bench_path) < 3 or bench_path[0] not in _OVERRIDABLE or not isinstance(bench_path[1], int):
        return None
    table, index = bench_path[0], bench_path[1]
    try:
        element_id = merged[table][index]["id"]
    except (KeyError, IndexError, TypeError):
        return None
    rest = bench_path[2:]
    if rest and rest[0] == "steps" and len(rest) > 1 and isinstance(rest[1], int):
        rest = ("steps", str(rest[1] + 1), *rest[2:])
    return (table, element_id, *rest)


def load_template(path: str | FsPath, bench: Bench | None = None) -> LoadedTemplate:
    """Load and validate a session template; with a bench, check it against that bench too."""
    source = read_text(path)
    data, positions = parse_toml(source)
    return template_from_data(source, data, positions, bench)


def template_from_data(source: SourceText, data: dict[str, Any], positions: PositionMap,
                       bench: Bench | None = None) -> LoadedTemplate:
    """Validate parsed template data, collecting every problem."""
    if "template" not in data:
        raise FileValidationError([Problem(source.name, 1, ("template",), "not a template file: no [template]"
                                           " table", "a [template] table with labkit_template = 1")])
    template, problems = _validate(SessionTemplate, data, source, positions)
    if template is not None:
        col = _Collector(source.name, positions)
        _check_template_alone(template, col)
        if bench is not None:
            check_template_against_bench(template, bench, col)
        problems += col.problems
    if problems:
        raise FileValidationError(problems)
    return LoadedTemplate(template, source)


def _check_template_alone(t: SessionTemplate, col: _Collector) -> None:
    seen: dict[str, int] = {}
    for i, step in enumerate(t.steps):
        if step.id in seen:
            col.add(("steps", i, "id"), f'step id "{step.id}" already used by step {seen[step.id]}',
                    "a unique, stable step id", code="duplicate")
        seen.setdefault(step.id, i)
        for j, r in enumerate(step.readings):
            where = ("steps", i, "readings", j)
            try:
                q = quantity(r.quantity)
            except UnknownNameError as exc:
                col.add((*where, "quantity"), str(exc), "a quantity from the registry", repr(r.quantity),
                        code="quantity")
                continue
            try:
                parse_location(r.location)
            except LocationError as exc:
                col.add((*where, "location"), str(exc), code="location")
            _check_unit(q.kind, q.unit, r.unit, (*where, "unit"), col)
            _check_tolerance(q.kind, q.unit, r.tolerance, (*where, "tolerance"), col)
        if step.kind == "calibration" and step.reference_meter.range:
            _check_meter_range(step.reference_meter.range, ("voltage", "current"),
                               ("steps", i, "reference_meter", "range"), col)


def _check_meter_range(text: str, kinds: Sequence[str], path: Path, col: _Collector) -> bool:
    """A reference meter's range is a voltage or a current with its unit, of the calibrated sensor's kind."""
    errors = []
    for kind in kinds:
        try:
            value = parse_quantity(text, kind)
        except UnitError as exc:
            errors.append(str(exc))
            continue
        if value > 0:
            return True
        errors.append(f'"{text}" is not a positive {kind}')
    hint = next((e for e in errors if "did you mean" in e or "decimal comma" in e), errors[0])
    col.add(path, f"reference meter range: {hint}",
            " or ".join(f'a {k} like "{KINDS[k].example}"' for k in kinds), repr(text), code="unit")
    return False


def _check_unit(kind: str, default_unit: str, unit: str, path: Path, col: _Collector) -> None:
    if default_unit in ("1", "%"):
        if unit not in ("1", "%", ""):
            col.add(path, f'unit "{unit}" does not fit this quantity', f'"{default_unit}"', repr(unit),
                    code="unit")
        return
    try:
        unit_factor(unit, kind)
    except UnitError as exc:
        expected = "" if "expected" in str(exc) else f'a unit of {kind.replace("_", " ")} like "{default_unit}"'
        col.add(path, str(exc), expected, repr(unit), code="unit")


def _check_tolerance(kind: str, default_unit: str, tol: str, path: Path, col: _Collector) -> None:
    text = tol.strip()
    if text == "instrument":
        return
    try:
        value = parse_quantity(text, "ratio")
    except UnitError:
        value = None
    if value is not None and text.endswith("%"):
        if not 0.0 < value <= 0.5:
            col.add(path, f"a tolerance of {value * 100:g} % is absurd", "more than 0 % and at most 50 %",
                    repr(tol), code="physical_range")
        return
    if default_unit in ("1", "%"):
        try:
            v = float(text.removesuffix("%").strip())
        except ValueError:
            v = -1.0
        # an absolute tolerance as wide as the whole scale (PF spans 1; THD is read in % points) is a typo
        widest = 100.0 if default_unit == "%" else 1.0
        if not 0 < v <= widest:
            col.add(path, "expected a tolerance" if v <= 0 else f"an absolute tolerance of {v:g} is absurd",
                    f'"instrument", "2 %" or an absolute value more than 0 and at most {widest:g} {default_unit}',
                    repr(tol), code="unit" if v <= 0 else "physical_range")
        return
    try:
        v = parse_quantity(text, kind)
    except UnitError as exc:
        col.add(path, f"tolerance: {exc}", f'"instrument", "2 %" or a {kind.replace("_", " ")} like '
                f'"{KINDS[kind].example}"', repr(tol), code="unit")
        return
    if v <= 0:
        col.add(path, "a tolerance must be positive", found=repr(tol), code="physical_range")


_VOLTAGE_QUANTITIES = {"v_rms", "v1_rms", "vh_rms", "v_angle", "v_dc", "thd_v", "crest_v", "frequency"}
_CURRENT_QUANTITIES = {"i_rms", "i1_rms", "ih_rms", "i_angle", "i_dc", "thd_i", "crest_i"}
_SYNC_QUANTITIES = {"slip", "beat_period", "dv_sync", "dphi_sync", "v_across", "advance_angle", "surge_peak"}


_SINGULAR = {"sources": "source", "line_branches": "line branch", "loads": "load", "sensors": "sensor",
             "switches": "switch"}


def check_template_against_bench(t: SessionTemplate, bench: Bench, col: _Collector) -> None:
    """Every reference a template makes must exist on the bench, and every step must be possible."""
    if t.template.bench_type is not None and t.template.bench_type != bench.bench.id:
        col.add(("template", "bench_type"), "the template is written for another bench type",
                repr(bench.bench.id), repr(t.template.bench_type))
    tables = {"sources": [s.id for s in bench.sources], "line_branches": [b.id for b in bench.line_branches],
              "loads": [ld.id for ld in bench.loads], "sensors": [s.id for s in bench.sensors],
              "switches": [s.id for s in bench.switches]}
    for table, ids in tables.items():
        for k, name in enumerate(getattr(t.template.requires, table)):
            if name not in ids:
                col.add(("template", "requires", table, k), f'the bench has no {_SINGULAR[table]} '
                        f'"{name}"{did_you_mean(name, ids)}', code="requirement")

    def ref(name: str, table: str, path: Path) -> bool:
        ids = tables[table]
        if name in ids:
            return True
        col.add(path, f'no {_SINGULAR[table]} "{name}" on this bench{did_you_mean(name, ids)}',
                f"one of {', '.join(ids)}" if ids else "", repr(name))
        return False

    buses = bench.bus_names
    ends = element_ends(bench)
    started: set[str] = set()
    for i, step in enumerate(t.steps):
        base: Path = ("steps", i)
        kind = step.kind
        if kind == "source_start":
            if ref(step.source, "sources", (*base, "source")):
                src = bench.source(step.source)
                if step.tap is not None and not isinstance(src, MainsReference):
                    col.add((*base, "tap"), "tap applies to a mains_reference source only")
                if isinstance(src, MainsReference) and step.tap is not None and not (
                        src.transformer.tap_min <= step.tap <= src.transformer.tap_max):
                    col.add((*base, "tap"), "tap outside the transformer's range",
                            f"{src.transformer.tap_min:g}..{src.transformer.tap_max:g}", f"{step.tap:g}",
                            code="physical_range")
                if isinstance(src, MainsReference) and (step.field_setting is not None
                                                        or step.frequency_setpoint is not None):
                    col.add(base, "field_setting and frequency_setpoint apply to an alternator_set only")
                if isinstance(src, AlternatorSet) and step.frequency_setpoint is not None:
                    sc = src.speed_control
                    if not sc.setpoint_min <= step.frequency_setpoint <= sc.setpoint_max:
                        col.add((*base, "frequency_setpoint"), "setpoint outside the set's range",
                                f"{sc.setpoint_min:g}..{sc.setpoint_max:g} Hz", f"{step.frequency_setpoint:g} Hz",
                                code="physical_range")
                started.add(step.source)
            for k, sw in enumerate(step.close):
                ref(sw, "switches", (*base, "close", k))
        elif kind == "synchronize":
            if ref(step.source, "sources", (*base, "source")) and step.source not in started:
                col.add((*base, "source"), f'source "{step.source}" is synchronized before any source_start '
                        "step starts it", "a source_start step for it earlier in the template",
                        code="impossible_step")
            if ref(step.switch, "switches", (*base, "switch")) and step.source in tables["sources"]:
                sw = bench.switch(step.switch)
                if bench.source(step.source).bus not in (sw.from_bus, sw.to_bus):
                    col.add((*base, "switch"), f'switch "{step.switch}" does not connect the bus of source '
                            f'"{step.source}"', f"a switch at bus {bench.source(step.source).bus}",
                            f"{sw.from_bus}-{sw.to_bus}", code="impossible_step")
        elif kind == "configure_lines":
            for name, pos in step.lines.items():
                if ref(name, "line_branches", (*base, "lines", name)):
                    names = [p.name for p in bench.branch(name).positions]
                    if pos != "open" and pos not in names:
                        col.add((*base, "lines", name), f'line "{name}" has no position "{pos}"'
                                f"{did_you_mean(pos, names)}", "open or " + ", ".join(names), repr(pos))
            for name in step.switches:
                ref(name, "switches", (*base, "switches", name))
        elif kind == "load_step":
            for name, n in step.loads.items():
                if ref(name, "loads", (*base, "loads", name)):
                    ld = bench.load(name)
                    count = len(ld.steps) if isinstance(ld, LinearLoad) else 1
                    if n > count:
                        col.add((*base, "loads", name), f'load "{name}" has no step {n}',
                                f"0 (off) to {count}", str(n), code="impossible_step")
        elif kind == "line_outage":
            ref(step.line, "line_branches", (*base, "line"))
        elif kind == "calibration" and ref(step.sensor, "sensors", (*base, "sensor")) and step.reference_meter.range:
            sensor_kind = bench.sensor(step.sensor).kind
            other = "current" if sensor_kind == "voltage" else "voltage"
            scratch = _Collector(col.file, col.positions)  # a range of neither kind is reported already
            if _check_meter_range(step.reference_meter.range, (other,), (), scratch):
                _check_meter_range(step.reference_meter.range, (sensor_kind,),
                                   (*base, "reference_meter", "range"), col)
        for j, r in enumerate(step.readings):
            _check_reading_place(r, bench, buses, ends, (*base, "readings", j), col)


def _check_reading_place(r: Any, bench: Bench, buses: Sequence[str], ends: dict[str, tuple[str, ...]],
                         where: Path, col: _Collector) -> None:
    try:
        loc = parse_location(r.location)
    except LocationError:
        return  # reported already
    q = r.quantity
    sensors = bench.sensors
    if r.sensor is not None:
        ids = [s.id for s in sensors]
        if r.sensor not in ids:
            col.add((*where, "sensor"), f'no sensor "{r.sensor}"{did_you_mean(r.sensor, ids)}', found=r.sensor)
            return
        sensors = [bench.sensor(r.sensor)]
    if loc.kind == "sensor":
        ids = [s.id for s in bench.sensors]
        if loc.name not in ids:
            col.add((*where, "location"), f'no sensor "{loc.name}"{did_you_mean(loc.name, ids)}')
        return
    if loc.kind == "node":
        if loc.name not in buses and loc.name not in ends:
            col.add((*where, "location"), f'no bus or element "{loc.name}"'
                    f"{did_you_mean(loc.name, [*buses, *ends])}", "a bus or element of the bench",
                    repr(r.location), code="location")
            return
        if loc.name in ends:  # whole-element quantities are computed, not measured by one sensor
            return
    else:
        if loc.name not in ends:
            col.add((*where, "location"), f'no element "{loc.name}"{did_you_mean(loc.name, list(ends))}',
                    code="location")
            return
        if loc.bus not in ends[loc.name]:
            col.add((*where, "location"), f'element "{loc.name}" has no end at bus "{loc.bus}"',
                    " or ".join(f"{loc.name}@{b}" for b in ends[loc.name]), repr(r.location), code="location")
            return
    if q in _SYNC_QUANTITIES or not is_registered(q):  # an unknown quantity is reported already
        return
    need_v = q in _VOLTAGE_QUANTITIES or q not in _CURRENT_QUANTITIES
    need_i = q in _CURRENT_QUANTITIES or q not in _VOLTAGE_QUANTITIES
    bus_name = loc.name if loc.kind == "node" else loc.bus
    if need_v and not any(s.kind == "voltage" and any(p.location == bus_name for p in s.placements)
                          for s in sensors):
        col.add((*where, "location"), f'no voltage sensor can be placed at bus "{bus_name}" for "{q}"',
                "a location listed in a voltage sensor's placements", repr(r.location), code="no_sensor")
    if need_i and (loc.kind != "end" or not any(
            s.kind == "current" and any(p.location == str(loc) for p in s.placements) for s in sensors)):
        col.add((*where, "location"), f'no current sensor can be placed at "{r.location}" for "{q}"',
                "an ELEMENT@BUS listed in a current sensor's placements", repr(r.location), code="no_sensor")


# -- checking many files ---------------------------------------------------------------------
@dataclass
class CheckResult:
    """What ``labkit check`` found in one file."""

    file: str
    kind: str
    problems: list[Problem]


def check_files(paths: Iterable[str | FsPath]) -> list[CheckResult]:
    """Validate bench, cart and template files together.

    Carts and templates are checked against a bench of their type among the
    given files, or else one found beside them.
    """
    parsed: list[tuple[SourceText, dict[str, Any] | None, PositionMap | None, str, list[Problem]]] = []
    for path in paths:
        try:
            src = read_text(path)
            data, pos = parse_toml(src)
            parsed.append((src, data, pos, file_kind(data), []))
        except FileValidationError as exc:
            parsed.append((SourceText(str(path), ""), None, None, "unknown", exc.problems))
    benches: dict[str, Bench] = {}
    results: list[CheckResult] = []
    for src, data, pos, kind, problems in parsed:
        if kind == "bench" and data is not None and pos is not None:
            try:
                lb = bench_from_data(src, data, pos)
                benches[lb.bench.bench.id] = lb.bench
            except FileValidationError as exc:
                problems = exc.problems
        results.append(CheckResult(src.name, kind, problems))
    for n, (src, data, pos, kind, _) in enumerate(parsed):
        if data is None or pos is None or kind == "bench":
            continue
        problems: list[Problem] = []
        try:
            if kind == "cart":
                bench_id = str(data["cart"].get("bench_type", "")) if isinstance(data["cart"], dict) else ""
                bench_path = _find_bench_file(bench_id, src, benches)
                if bench_path is None:
                    problems = [Problem(src.name, pos.line_of(("cart", "bench_type")), ("cart", "bench_type"),
                                        f'no bench file of type "{bench_id}" given or beside this file')]
                else:
                    bench_from_data(*_reparse(bench_path), cart_source=src)
            elif kind == "template":
                header = data["template"] if isinstance(data["template"], dict) else {}
                bench_id = str(header.get("bench_type", ""))
                bench = benches.get(bench_id)
                if bench is None and bench_id:
                    found = _find_bench_file(bench_id, src, benches)
                    bench = bench_from_data(*_reparse(found)).bench if found else None
                template_from_data(src, data, pos, bench)
            else:
                problems = [Problem(src.name, 1, (), "not a labkit file: expected a [bench], [cart] or [template]"
                                    " table", code="unknown_file")]
        except FileValidationError as exc:
            problems = exc.problems
        results[n] = CheckResult(src.name, kind, problems)
    return results


def _reparse(path: FsPath) -> tuple[SourceText, dict[str, Any], PositionMap]:
    src = read_text(path)
    data, pos = parse_toml(src)
    return src, data, pos


def _find_bench_file(bench_id: str, near: SourceText, given: dict[str, Bench]) -> FsPath | None:
    folder = FsPath(near.name).parent
    for candidate in sorted(folder.glob("*.toml")):
        try:
            data, _ = parse_toml(read_text(candidate))
        except LabkitError:
            continue
        header = data.get("bench")
        if isinstance(header, dict) and header.get("id") == bench_id:
            return candidate
    return None
