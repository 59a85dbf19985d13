"""The position scanner against tomllib: every value tomllib reads has the line where its key is written.

tomllib (the standard library's TOML 1.0 parser) is the outside reference for what the paths are; the scanner
must give each of them a line whose text holds the key. Tricky cases come from the TOML 1.0.0 specification
(toml.io/en/v1.0.0): multi-line strings, quoted and dotted keys, inline tables, arrays of tables.
"""

from __future__ import annotations

import json
import tomllib
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from labkit.files.tomlpos import scan_positions

TRICKY = '''# a comment with [brackets] and key = value in it
title = """
[not_a_table]
key = "not a key"
"""
literal = \'\'\'
[[neither]]
\'\'\'
"quoted key" = 1
'dotted.looking' = 2
a.b.c = 3   # [comment]
inline = { x = 1, y = { z = [1,
  2,   # a comment inside an array [x]
  3] } }
nested = [[1, 2], ["a", "b"]]
escaped = "a \\" quote and ] bracket"
ending = """ends with two quotes"""""

[table]  # comment [x]
r = 1

[[aot]]
r = 2

  [[aot.sub]]
  r = 3

  [[aot.sub]]
  r = 4

[[aot]]
r = 5

  [[aot.sub]]
  r = 6

  [aot.sub.deeper]
  r = 7

[ spaced . "header" ]
r = 8
'''

EXPECTED = {
    ("title",): 2, ("literal",): 6, ("quoted key",): 9, ("dotted.looking",): 10, ("a", "b", "c"): 11,
    ("inline", "x"): 12, ("inline", "y", "z"): 12, ("inline", "y", "z", 1): 13, ("inline", "y", "z", 2): 14,
    ("nested", 1, 0): 15, ("escaped",): 16, ("ending",): 17, ("table", "r"): 20,
    ("aot", 0, "r"): 23, ("aot", 0, "sub", 0, "r"): 26, ("aot", 0, "sub", 1, "r"): 29, ("aot", 1, "r"): 32,
    ("aot", 1, "sub", 0, "r"): 35, ("aot", 1, "sub", 0, "deeper", "r"): 38, ("spaced", "header", "r"): 41,
    ("aot", 1): 31, ("aot", 0, "sub", 1): 28,
}


def test_tricky_document_parses_with_tomllib() -> None:
    data = tomllib.loads(TRICKY)
    assert data["title"].startswith("[not_a_table]")
    assert data["ending"] == 'ends with two quotes""'
    assert [s["r"] for s in data["aot"][0]["sub"]] == [3, 4]


@pytest.mark.parametrize(("path", "line"), sorted(EXPECTED.items(), key=lambda kv: kv[1]))
def test_tricky_positions(path: tuple[str | int, ...], line: int) -> None:
    assert scan_positions(TRICKY).line_of(path) == line


def test_strings_do_not_make_keys_or_tables() -> None:
    paths = scan_positions(TRICKY).positions
    assert ("not_a_table",) not in paths
    assert ("neither",) not in paths
    assert ("key",) not in paths


def test_line_of_falls_back_to_the_nearest_parent() -> None:
    pos = scan_positions(TRICKY)
    assert pos.line_of(("aot", 1, "sub", 0, "missing")) == 34  # the [[aot.sub]] header of that element
    assert pos.line_of(("nowhere",)) == 0
    assert pos.column_of(("table", "r")) == 1
    assert pos.column_of(("inline", "y")) == 19


def test_repeated_key_gets_each_its_own_line() -> None:
    text = "".join(f"[[sec]]\nid = \"S{i}\"\nr = \"{i} ohm\"\n\n" for i in range(5))
    pos = scan_positions(text)
    assert [pos.line_of(("sec", i, "r")) for i in range(5)] == [3, 7, 11, 15, 19]


# -- property: random documents ---------------------------------------------------------------------------------
KEYS = st.sampled_from(["r", "bus", "id", "name", "x-y", "k_2", "a b", "dot.ted", "é"])
STRINGS = st.sampled_from(["plain", "[x]", "key = 1", "a # b", "q\"uote", "", "[[y]]\nz = 2"])
SCALARS = st.one_of(st.integers(-10**6, 10**6), st.booleans(), STRINGS,
                    st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False))


def _trees(depth: int) -> st.SearchStrategy[dict[str, Any]]:
    leaf = st.one_of(SCALARS, st.lists(SCALARS, max_size=3), st.lists(st.lists(st.integers(0, 9), max_size=2),
                                                                     max_size=2))
    if depth == 0:
        return st.dictionaries(KEYS, leaf, max_size=4)
    child = _trees(depth - 1)
    return st.dictionaries(KEYS, st.one_of(leaf, child, st.lists(child, min_size=1, max_size=2)), max_size=4)


def _key(k: str) -> str:
    return k if all(c.isascii() and (c.isalnum() or c in "_-") for c in k) else json.dumps(k)


def _scalar(v: Any, style: int) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        if style % 3 == 1 and "'" not in v and "\n" not in v:
            return f"'{v}'"
        if style % 3 == 2 and '"""' not in v and not v.endswith('"'):
            return f'"""\n{v}"""'  # multi-line basic string: the newline after the quotes is trimmed
        return json.dumps(v)
    return repr(v)


def _value(v: Any, style: int) -> str:
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_key(k)} = {_value(x, style + 1)}" for k, x in v.items()) + " }"
    if isinstance(v, list):
        sep = ",\n  # [comment]\n  " if style % 2 else ", "  # multi-line arrays with bracketed comments
        return "[" + sep.join(_value(x, style + 1) for x in v) + "]"
    return _scalar(v, style)


def _emit(d: dict[str, Any], header: list[str], out: list[str], style: int) -> None:
    """Write table ``d``: scalars first, then dotted or inline tables, then sub-tables and arrays of tables."""
    later: list[tuple[str, Any]] = []
    for n, (k, v) in enumerate(d.items()):
        s = style + n
        is_table = isinstance(v, dict) and v
        is_aot = isinstance(v, list) and v and all(isinstance(x, dict) for x in v)
        if is_table and s % 3 == 0 and v and not any(isinstance(x, dict | list) for x in v.values()):
            out += [f"{_key(k)}.{_key(sk)} = {_value(sv, s)}" for sk, sv in v.items()]  # dotted keys
        elif (is_table or is_aot) and s % 3 != 2:
            later.append((k, v))
        else:
            out.append(f"{_key(k)} = {_value(v, s)}  # trailing [comment]")
    for n, (k, v) in enumerate(later):
        path = [*header, _key(k)]
        if isinstance(v, dict):
            out.append(f"\n[{'.'.join(path)}]")
            _emit(v, path, out, style + n + 1)
        else:
            for item in v:
                out.append(f"\n[[{'.'.join(path)}]]")
                _emit(item, path, out, style + n + 1)


def _leaves(node: Any, path: tuple[str | int, ...] = ()) -> list[tuple[str | int, ...]]:
    if isinstance(node, dict) and node:
        return [p for k, v in node.items() for p in _leaves(v, (*path, k))]
    if isinstance(node, list) and node:
        return [p for i, v in enumerate(node) for p in _leaves(v, (*path, i))]
    return [path] if path else []


@settings(max_examples=200, deadline=None)
@given(tree=_trees(2), style=st.integers(0, 5))
def test_every_leaf_has_the_line_of_its_key(tree: dict[str, Any], style: int) -> None:
    lines: list[str] = []
    _emit(tree, [], lines, style)
    text = "\n".join(lines) + "\n"
    data = tomllib.loads(text)  # the reference parser reads what the generator wrote
    pos = scan_positions(text)
    text_lines = text.splitlines()
    for leaf in _leaves(data):
        assert leaf in pos.positions, f"{leaf} has no position in:\n{text}"
        line, col = pos.positions[leaf]
        key = next(p for p in reversed(leaf) if isinstance(p, str))
        if isinstance(leaf[-1], str):
            written = text_lines[line - 1]
            assert key in written or json.dumps(key)[1:-1] in written, (leaf, line, text)
        else:  # an array element: its position is where the element's own text starts
            assert text_lines[line - 1][col - 1] not in " ,]#", (leaf, line, col, text)
