"""Turn pydantic validation errors into located problems (file, line, field path, expected, found)."""

from __future__ import annotations

import types
import typing
from typing import Any, Literal, Union, get_args, get_origin

from pydantic import BaseModel, ValidationError

from labkit.core.errors import Problem, did_you_mean
from labkit.files.tomlpos import Path, PositionMap


def _unwrap(tp: Any) -> Any:
    while True:
        origin = get_origin(tp)
        if origin is typing.Annotated:
            tp = get_args(tp)[0]
            continue
        if origin in (Union, types.UnionType):
            args = [a for a in get_args(tp) if a is not type(None)]
            if len(args) == 1:
                tp = args[0]
                continue
        return tp


def _union_members(tp: Any) -> list[Any]:
    origin = get_origin(tp)
    if origin in (Union, types.UnionType):
        return [_unwrap(a) for a in get_args(tp) if a is not type(None)]
    return []


def _tags_of(model: type[BaseModel]) -> set[str]:
    field = model.model_fields.get("kind")
    if field is None:
        return set()
    ann = _unwrap(field.annotation)
    if get_origin(ann) is Literal:
        return {str(a) for a in get_args(ann)}
    return set()


def _field_by_key(model: type[BaseModel], key: str) -> tuple[str, Any] | None:
    for name, info in model.model_fields.items():
        if key in (name, info.alias):
            return (info.alias or name), info.annotation
    return None


def file_path_of(model: type[BaseModel], loc: tuple[Any, ...]) -> tuple[Path, type[BaseModel] | None]:
    """Map a pydantic ``loc`` to the path as written in the file, and the model owning the last key.

    Discriminator tags that pydantic inserts into ``loc`` are dropped; aliases
    (``from``) are used where the file uses them.
    """
    out: list[str | int] = []
    tp: Any = model
    owner: type[BaseModel] | None = model
    for part in loc:
        tp = _unwrap(tp)
        members = _union_members(tp)
        if members:
            chosen = next((m for m in members if isinstance(m, type) and part in _tags_of(m)), None)
            if chosen is not None:
                tp = chosen
                continue
            tp = None
        if isinstance(tp, type) and issubclass(tp, BaseModel):
            owner = tp
            found = _field_by_key(tp, str(part))
            if found is None:
                out.append(part)
                tp = None
            else:
                out.append(found[0])
                tp = found[1]
            continue
        origin = get_origin(tp)
        if origin is list:
            out.append(part)
            tp = get_args(tp)[0]
        elif origin is dict:
            out.append(part)
            tp = get_args(tp)[1]
        else:
            out.append(part)
            tp = None
    last = _unwrap(tp)
    if isinstance(last, type) and issubclass(last, BaseModel):
        owner = last
    return tuple(out), owner


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def problems_from_validation_error(
    exc: ValidationError, model: type[BaseModel], file: str, positions: PositionMap,
    prefix: Path = (),
) -> list[Problem]:
    """One :class:`Problem` per pydantic error, located in the file."""
    problems: list[Problem] = []
    for err in exc.errors(include_url=False):
        loc = tuple(err["loc"])
        kind = err["type"]
        path, _owner = file_path_of(model, loc)
        full = prefix + path
        found = "" if kind in ("missing", "union_tag_not_found") else _short(err.get("input"))
        expected = ""
        if kind == "extra_forbidden":
            key = str(path[-1]) if path else ""
            _parent_path, parent = file_path_of(model, loc[:-1])
            allowed = [info.alias or name for name, info in parent.model_fields.items()] if parent else []
            message = f'unknown key "{key}"{did_you_mean(key, allowed)}'
            expected = "one of " + ", ".join(allowed) if allowed else ""
            found = ""
        elif kind == "missing":
            message = "missing required field"
            _, field_owner = file_path_of(model, loc[:-1])
            if field_owner is not None:
                info = next((i for n, i in field_owner.model_fields.items() if str(loc[-1]) in (n, i.alias)), None)
                if info is not None:
                    # quantity fields keep their QuantitySpec in the field's metadata, not in the annotation
                    expected = _describe_type(typing.Annotated[info.annotation, *info.metadata]
                                              if info.metadata else info.annotation)
        elif kind == "union_tag_invalid":
            ctx = err.get("ctx", {})
            tag = str(ctx.get("tag"))
            tags = [t.strip().strip("'") for t in str(ctx.get("expected_tags", "")).split(",")]
            message = f'unknown kind "{tag}"{did_you_mean(tag, tags)}'
            expected = f"kind one of {ctx.get('expected_tags')}"
            full = (*full, "kind")
            found = ""
        elif kind == "union_tag_not_found":
            message = 'missing "kind"'
            full = (*full, "kind")
            problems += _unknown_keys_of_union(model, loc, err.get("input"), file, prefix + path, positions)
        elif kind in ("unit", "physical_range"):
            message = err["msg"]
        elif kind == "value_error":
            message = err["msg"].removeprefix("Value error, ")
            full = (*full, *err.get("ctx", {}).get("at", ()))  # a model check pointing at one of its keys
            if isinstance(err.get("input"), dict):  # a whole-table check: the table is the finding
                found = ""
        else:
            message = err["msg"]
        line = positions.line_of(full)
        problems.append(Problem(file, line, full, message, expected, found,
                                column=positions.column_of(full), code=kind))
    return problems


def _unknown_keys_of_union(model: type[BaseModel], loc: tuple[Any, ...], data: Any, file: str, path: Path,
                           positions: PositionMap) -> list[Problem]:
    """Keys no member of a tagged union knows: a misspelt ``kind`` is reported as such, not only as missing.

    Without its tag pydantic validates no member, so it reports neither the
    misspelt key nor the others; the keys known to no member are reported here.
    """
    if not isinstance(data, dict):
        return []
    tp: Any = model
    for part in loc:  # walk to the union the loc points at
        tp = _unwrap(tp)
        if isinstance(tp, type) and issubclass(tp, BaseModel):
            hit = _field_by_key(tp, str(part))
            tp = hit[1] if hit else None
        elif get_origin(tp) in (list, dict):
            tp = get_args(tp)[-1]
        else:
            return []
    members = [m for m in _union_members(_unwrap(tp)) if isinstance(m, type) and issubclass(m, BaseModel)]
    allowed = sorted({info.alias or name for m in members for name, info in m.model_fields.items()})
    out = []
    for key in data:
        if key not in allowed:
            where = (*path, key)
            out.append(Problem(file, positions.line_of(where), where,
                               f'unknown key "{key}"{did_you_mean(str(key), allowed)}',
                               column=positions.column_of(where), code="extra_forbidden"))
    return out


def _describe_type(tp: Any) -> str:
    from labkit.core.fields import QuantitySpec
    from labkit.core.units import KINDS

    if get_origin(tp) is typing.Annotated:
        for meta in get_args(tp)[1:]:
            if isinstance(meta, QuantitySpec):
                return f'a {meta.kind.replace("_", " ")} like "{KINDS[meta.kind].example}"'
    base = _unwrap(tp)
    if get_origin(base) is Literal:
        return "one of " + ", ".join(repr(a) for a in get_args(base))
    if isinstance(base, type) and issubclass(base, BaseModel):
        return f"a table ({base.__name__})"
    if get_origin(base) is list:
        return "a list"
    if get_origin(base) is dict:
        return "a table"
    words = {str: "a string", int: "an integer", float: "a number", bool: "true or false"}
    return words.get(base, getattr(base, "__name__", str(base)))
