"""Property: any single typo in a shipped demo file gives a FileValidationError located at that typo.

A key (any depth, inline tables and array elements included) of the demo bench, cart or a template is picked and
its value replaced with a wrong one (wrong TOML type, a random string, a negative number, a unit of another
dimension, a huge number), or the key is misspelt, or deleted. The text is edited in place, so line numbers stay
those of the original file. Only :class:`FileValidationError` may come out (anything else fails the test), and one
of its problems must name the mutated file, the key's line and its field path (for a deletion: a path inside the
parent table, at the parent's line).

Which values are wrong is decided from outside the loader where possible: "another dimension" is judged with pint's
own dimensional analysis (pint documentation, "Dimensionality"), not with labkit's unit layer.
"""

from __future__ import annotations

import json
import re
import tomllib
import types
import typing
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal, Union, get_args, get_origin

import pint
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pydantic import BaseModel
from pydantic.fields import FieldInfo

from labkit.core.bench import Bench
from labkit.core.errors import FileValidationError, Problem
from labkit.core.fields import QuantitySpec
from labkit.core.template import SessionTemplate
from labkit.files.loader import SourceText, _CartHeader, bench_from_data, parse_toml, template_from_data
from labkit.files.tomlpos import scan_positions
from tests.conftest import DEMO

BENCH_FILE = DEMO / "demo-bench.toml"
CART_FILE = DEMO / "demo-cart-03.toml"
TEMPLATE_FILES = sorted(DEMO.glob("lab*.toml"))
FREE_TEXT = {"title", "description", "instructions", "scenario", "note", "meter", "version", "cautions",
             "objectives"}
UREG = pint.UnitRegistry()
UREG.define("var = volt * ampere")  # reactive power: the dimension of VA (IEEE 1459-2010 keeps the names apart)
OTHER_UNITS = ["kg", "V", "A", "ohm", "H", "F", "Hz", "W", "m", "s", "N*m", "mol", "K", "cd", "kg*m**2"]


# -- what the models say about a path -------------------------------------------------------------------
def _unwrap(tp: Any) -> Any:
    while True:
        if get_origin(tp) is typing.Annotated:
            tp = get_args(tp)[0]
        elif get_origin(tp) in (Union, types.UnionType) and type(None) in get_args(tp):
            args = [a for a in get_args(tp) if a is not type(None)]
            tp = args[0] if len(args) == 1 else Union[tuple(args)]  # noqa: UP007 - built at run time
        else:
            return tp


def _specs(tp: Any) -> list[QuantitySpec]:
    """QuantitySpec metadata anywhere in an annotation (inside Optional and Annotated)."""
    found: list[QuantitySpec] = []
    if get_origin(tp) is typing.Annotated:
        found += [m for m in get_args(tp)[1:] if isinstance(m, QuantitySpec)]
        found += _specs(get_args(tp)[0])
    elif get_origin(tp) in (Union, types.UnionType):
        for a in get_args(tp):
            found += _specs(a)
    return found


@dataclass
class FieldAt:
    """What a file path points at: the model field (None for list items and dict entries) and its spec."""

    info: FieldInfo | None
    spec: QuantitySpec | None
    literal: bool
    parent_keys: set[str]


def field_at(model: type[BaseModel], data: Any, path: tuple[str | int, ...]) -> FieldAt:
    tp: Any = model
    info: FieldInfo | None = None
    node = data
    parent_keys: set[str] = set()
    for part in path:
        tp = _unwrap(tp)
        if get_origin(tp) in (Union, types.UnionType):  # a tagged union: the member named by "kind"
            tag = node.get("kind") if isinstance(node, dict) else None
            tp = next(m for m in get_args(_unwrap(tp)) if tag in get_args(_unwrap(m.model_fields["kind"].annotation)))
        if isinstance(tp, type) and issubclass(tp, BaseModel):
            parent_keys = {i.alias or n for n, i in tp.model_fields.items()}
            info = next(i for n, i in tp.model_fields.items() if part in (n, i.alias))
            tp = typing.Annotated[info.annotation, *info.metadata] if info.metadata else info.annotation
        else:
            info, parent_keys = None, set()
            tp = get_args(_unwrap(tp))[-1]  # list item or dict value type
        node = node[part]
    spec = (info and next((m for m in info.metadata if isinstance(m, QuantitySpec)), None)) or next(
        iter(_specs(tp)), None)
    return FieldAt(info, spec, get_origin(_unwrap(tp)) is Literal, parent_keys)


def model_view(kind: str, data: dict[str, Any], bench_data: dict[str, Any],
               path: tuple[str | int, ...]) -> FieldAt | None:
    """The model field behind a path of a bench, template or cart file (None: a cart element entry)."""
    if kind == "bench":
        return field_at(Bench, data, path)
    if kind == "template":
        return field_at(SessionTemplate, data, path)
    if path[0] == "cart":
        return field_at(_CartHeader, data["cart"], path[1:])
    if len(path) < 3:
        return None  # [table.ID]: an element entry, not a model field
    table, element_id, *rest = path
    index = [it["id"] for it in bench_data[table]].index(element_id)
    if rest[0] == "steps" and len(rest) > 1:
        rest = ["steps", int(rest[1]) - 1, *rest[2:]]
    return field_at(Bench, bench_data, (table, index, *rest))


# -- editing TOML text at a key -------------------------------------------------------------------------
def value_end(text: str, i: int) -> int:
    """Index just past the TOML value starting at ``text[i]``."""
    if text.startswith(('"""', "'''"), i):
        return text.index(text[i:i + 3], i + 3) + 3
    if text[i] in "\"'":
        j = i + 1
        while text[j] != text[i]:
            j += 2 if text[j] == "\\" and text[i] == '"' else 1
        return j + 1
    if text[i] in "[{":
        depth, j = 0, i
        while True:
            c = text[j]
            if c in "\"'":
                j = value_end(text, j)
                continue
            depth += (c in "[{") - (c in "]}")
            j += 1
            if depth == 0:
                return j
    m = re.compile(r"[^,\]}\n#]*").match(text, i)
    assert m is not None
    return i + len(m.group(0).rstrip())


@dataclass
class Site:
    """One mutable place: a ``key = value`` (key span and value span) or an array element (value span only)."""

    path: tuple[str | int, ...]
    line: int
    key_span: tuple[int, int] | None
    value_span: tuple[int, int]
    value: Any


def sites_of(text: str) -> list[Site]:
    data = tomllib.loads(text)
    starts = [0] + [m.end() for m in re.finditer("\n", text)]
    out: list[Site] = []
    for path, (line, col) in scan_positions(text).positions.items():
        at = starts[line - 1] + col - 1
        try:
            value: Any = data
            for part in path:
                value = value[part]
        except (KeyError, IndexError, TypeError):
            continue
        if isinstance(path[-1], int):
            if col > 1 and text[at] in "\"'[{-+0123456789tf":
                out.append(Site(path, line, None, (at, value_end(text, at)), value))
            continue
        m = re.compile(rf"{re.escape(str(path[-1]))}\s*=\s*").match(text, at)
        if m:  # a key written as key = value (not a table header)
            out.append(Site(path, line, (at, at + len(str(path[-1]))), (m.end(), value_end(text, m.end())), value))
    return out


def toml_value(value: Any) -> str:
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, bool):
        return "true" if value else "false"
    return repr(value)


_NUMBER_UNIT = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")


def _dimension(unit: str) -> Any:
    return UREG.Unit(unit.replace("^", "**").replace("%", "percent")).dimensionality


# -- the mutations -----------------------------------------------------------------------------------------
class Mutation:
    """One edit of a demo file (a plain class, so a failing example prints as one line)."""

    def __init__(self, file: str, kind: str, text: str, op: str, path: tuple[str | int, ...], line: int,
                 required: bool = True) -> None:
        self.file, self.kind, self.text, self.op = file, kind, text, op  # kind: bench, cart or template
        self.path = path  # the path the error must name (the parent path for a deletion)
        self.line = line
        self.required = required  # deletions of optional keys may load

    def __repr__(self) -> str:
        shown = self.text.splitlines()[self.line - 1]
        return f"Mutation({self.op} in {self.file} at {self.path}, line {self.line}: {shown!r})"


def _allowed_ops(kind: str, site: Site, view: FieldAt | None) -> list[str]:
    name = next((p for p in reversed(site.path) if isinstance(p, str)), "")
    free = name in FREE_TEXT or site.path[-2:] == ("reference_meter", "id") or (
        kind == "cart" and site.path[:2] == ("cart", "measured_on"))
    ops = ["wrong_type"]
    v = site.value
    if not free or not isinstance(v, str):
        ops.append("random_string")
    spec = view.spec if view else None
    negative_ok = spec is not None and (spec.minimum is None or spec.minimum < 0)
    number_string = isinstance(v, str) and _NUMBER_UNIT.match(v) is not None and not free
    is_number = isinstance(v, int | float) and not isinstance(v, bool)
    if (is_number or number_string) and not negative_ok:
        ops.append("negative")
    if (number_string and _NUMBER_UNIT.match(v).group(2)) or name == "unit":  # type: ignore[union-attr]
        ops.append("other_unit")
    if is_number or number_string:
        ops.append("huge")
    if site.key_span is not None:
        ops += ["rename", "delete"]
    return ops


@st.composite
def mutations(draw: st.DrawFn) -> Mutation:
    file = draw(st.sampled_from([BENCH_FILE, CART_FILE, *TEMPLATE_FILES]))
    kind = "bench" if file == BENCH_FILE else "cart" if file == CART_FILE else "template"
    text = file.read_text()
    data = tomllib.loads(text)
    site = draw(st.sampled_from(sites_of(text)))
    view = model_view(kind, data, BENCH_DATA, site.path)
    op = draw(st.sampled_from(_allowed_ops(kind, site, view)))
    (k0, k1), (v0, v1) = site.key_span or (None, None), site.value_span
    v = site.value
    new_value = ""
    if op == "wrong_type":
        choices = ["42", "true", "[1, 2]", "{ x = 1 }"] if isinstance(v, str) else ['"zq x"', "[1]", "{ x = 1 }"]
        if isinstance(v, list):
            choices = ['"zq x"', "7", "{ x = 1 }"]
        new_value = draw(st.sampled_from(choices))
    elif op == "random_string":
        tail = draw(st.text(alphabet="abcxyz019#!? ", max_size=8))
        new_value = json.dumps("zq x" + tail)  # an inner space: no name, unit, location or number has one
    elif op == "negative":
        if isinstance(v, str):
            number, unit = _NUMBER_UNIT.match(v).groups()  # type: ignore[union-attr]
            new_value = json.dumps(f"-{abs(float(number)) + 1:g} {unit}".strip())
        else:
            new_value = toml_value(-abs(v) - 1)
    elif op == "other_unit":
        if isinstance(v, str) and (m := _NUMBER_UNIT.match(v)) and m.group(2):
            number, unit = m.groups()
        else:
            number, unit = "", str(v)
        taken = {_dimension(unit) if unit not in ("1", "") else UREG.dimensionless.dimensionality}
        if site.path[-1] == "tolerance" and "readings" in site.path:
            # a reading's tolerance may be in % or in the reading's own unit: both dimensions are right
            reading: Any = data
            for part in site.path[:-1]:
                reading = reading[part]
            taken |= {UREG.dimensionless.dimensionality, _dimension(reading["unit"]) if reading["unit"] not in (
                "1", "%") else UREG.dimensionless.dimensionality}
        other = draw(st.sampled_from([u for u in OTHER_UNITS if _dimension(u) not in taken]))
        new_value = json.dumps(f"{number} {other}".strip())
    elif op == "huge":
        if isinstance(v, str):
            new_value = json.dumps(f"1e30 {_NUMBER_UNIT.match(v).group(2)}".strip())  # type: ignore[union-attr]
        else:
            new_value = "1" + "0" * 30 if isinstance(v, int) else "1e300"
    if op in ("wrong_type", "random_string", "negative", "other_unit", "huge"):
        mutated = text[:v0] + new_value + text[v1:]
        return Mutation(file.name, kind, mutated, op, site.path, site.line)
    assert k0 is not None
    assert k1 is not None
    parent = site.path[:-1]
    if op == "rename":
        key = str(site.path[-1])
        pos = draw(st.integers(0, len(key)))
        how = draw(st.sampled_from(["insert", "drop", "swap"]))
        if how == "drop" and len(key) >= 3:
            new_key = key[:min(pos, len(key) - 1)] + key[min(pos, len(key) - 1) + 1:]
        elif how == "swap" and len(key) >= 2 and pos < len(key) - 1 and key[pos] != key[pos + 1]:
            new_key = key[:pos] + key[pos + 1] + key[pos] + key[pos + 2:]
        else:
            new_key = key[:pos] + draw(st.sampled_from("qxz")) + key[pos:]
        siblings: Any = data
        for part in parent:
            siblings = siblings[part]
        taken = set(siblings) | (view.parent_keys if view else set()) | NAMES_IN_DEMO
        if new_key in taken:
            new_key = key + "qx"
        mutated = text[:k0] + new_key + text[k1:]
        return Mutation(file.name, kind, mutated, op, (*parent, new_key), site.line)
    # delete: the key and its value; inside an inline table also one neighbouring comma
    start, end = k0, v1
    inline = text.rfind("\n", 0, k0) < text.rfind("{", 0, k0)
    if inline:
        after = re.compile(r"\s*,\s*").match(text, end)
        before = re.compile(r",\s*$").search(text, 0, start)
        if after:
            end = after.end()
        elif before:
            start = before.start()
    removed = text[start:end]
    mutated = text[:start] + "\n" * removed.count("\n") + text[end:]
    positions = scan_positions(text)
    required = view is not None and view.info is not None and view.info.is_required()
    if kind == "cart" and site.path[0] != "cart":
        required = False  # a cart overrides what it lists; leaving a value out keeps the bench type's
    return Mutation(file.name, kind, mutated, op, parent, positions.line_of(parent) or site.line, required)


BENCH_DATA = tomllib.loads(BENCH_FILE.read_text())
NAMES_IN_DEMO = set(re.findall(r'"([A-Za-z][A-Za-z0-9_.-]*)"', BENCH_FILE.read_text()))
BENCH_SOURCE = SourceText(str(BENCH_FILE), BENCH_FILE.read_text())
DEMO_BENCH = bench_from_data(BENCH_SOURCE, *parse_toml(BENCH_SOURCE)).bench


def load_mutated(m: Mutation, bench: Bench) -> None:
    source = SourceText(m.file, m.text)
    if m.kind == "bench":
        data, pos = parse_toml(source)
        bench_from_data(source, data, pos)
    elif m.kind == "cart":
        data, pos = parse_toml(BENCH_SOURCE)
        bench_from_data(BENCH_SOURCE, data, pos, cart_source=source)
    else:
        data, pos = parse_toml(source)
        template_from_data(source, data, pos, bench)


def _matches(p: Problem, m: Mutation) -> bool:
    if p.file != m.file:
        return False
    if m.op == "delete":
        if p.path[:len(m.path)] == m.path:
            return p.line == m.line
        # emptying a table can make its owner invalid (a step with no lines): one level up, at that line
        return (len(p.path) == len(m.path) - 1 and m.path[:len(p.path)] == p.path
                and p.line == scan_positions(m.text).line_of(p.path))
    # a value's own path, or deeper inside it (a table or list put where a scalar belongs), on its line
    return p.path[:len(m.path)] == m.path and p.line == m.line


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(m=mutations())
def test_a_typo_is_located_at_the_typo(m: Mutation) -> None:
    tomllib.loads(m.text)  # the mutator keeps the file valid TOML: the loader, not the parser, must catch it
    problems: list[Problem] = []
    try:
        load_mutated(m, DEMO_BENCH)
    except FileValidationError as exc:  # the only exception allowed out; any other fails the test
        problems = exc.problems
    if not problems:
        assert m.op == "delete", f"{m.op} at {m.path} (line {m.line}) loaded without error"
        assert not m.required, f"deleting required {m.path} (line {m.line}) loaded without error"
        return
    shown = "\n".join(map(str, problems))
    assert any(_matches(p, m) for p in problems), f"{m.op} at {m.path} (line {m.line}) not located; got:\n{shown}"


def test_the_demo_files_load_unmutated(demo_bench: Bench) -> None:
    for file in [BENCH_FILE, CART_FILE, *TEMPLATE_FILES]:
        m = Mutation(str(file), "bench" if file == BENCH_FILE else "cart" if file == CART_FILE else "template",
                     file.read_text(), "none", (), 0)
        load_mutated(m, demo_bench)


@pytest.mark.parametrize("file", [BENCH_FILE, CART_FILE, *TEMPLATE_FILES], ids=lambda p: Path(p).name)
def test_every_key_is_a_site(file: Path) -> None:
    # the mutator reaches every key = value of the file (so the property covers every depth)
    text = file.read_text()
    key_lines = {n for n, line in enumerate(text.splitlines(), 1) if re.match(r"\s*[A-Za-z_]+\s*=", line)}
    assert key_lines <= {s.line for s in sites_of(text) if s.key_span is not None}
