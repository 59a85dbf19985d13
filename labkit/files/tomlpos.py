"""Where each key of a TOML document is: a position map from field paths to line numbers.

:mod:`tomllib` gives the values but no positions. This scanner walks the same
text and records, for every key and every array element, the line and column
where it is written, under its full resolved path (table headers, arrays of
tables, dotted keys, inline tables and arrays included), so a message about
``line_sections[2].r`` names the line of *that* ``r`` even when ``r`` appears
in every section. It assumes the text already parsed with :mod:`tomllib`; it
does not convert values.
"""

from __future__ import annotations

from dataclasses import dataclass, field

Path = tuple[str | int, ...]

_BARE = set("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789_-")


_ESCAPES = {"b": "\b", "t": "\t", "n": "\n", "f": "\f", "r": "\r", '"': '"', "\\": "\\"}


def _unescape(raw: str) -> str:
    """The value of a one-line basic string's body (TOML 1.0 escapes), so a quoted key ``"\\u00e9"`` is ``é``."""
    out: list[str] = []
    i = 0
    while i < len(raw):
        c = raw[i]
        if c != "\\" or i + 1 >= len(raw):
            out.append(c)
            i += 1
            continue
        e = raw[i + 1]
        if e in "uU":
            width = 4 if e == "u" else 8
            out.append(chr(int(raw[i + 2:i + 2 + width], 16)))
            i += 2 + width
        else:
            out.append(_ESCAPES.get(e, e))
            i += 2
    return "".join(out)


@dataclass
class PositionMap:
    """Field path -> (line, column), both 1-based."""

    positions: dict[Path, tuple[int, int]] = field(default_factory=dict)

    def line_of(self, path: Path) -> int:
        """Line of ``path``, or of its nearest recorded ancestor (0 if none)."""
        p = tuple(path)
        while p:
            if p in self.positions:
                return self.positions[p][0]
            p = p[:-1]
        return 0

    def column_of(self, path: Path) -> int:
        """Column of ``path``, or of its nearest recorded ancestor (0 if none)."""
        p = tuple(path)
        while p:
            if p in self.positions:
                return self.positions[p][1]
            p = p[:-1]
        return 0


class _Scanner:
    def __init__(self, text: str) -> None:
        self.s = text
        self.i = 0
        self.line = 1
        self.line_start = 0
        self.map = PositionMap()
        self.aot_count: dict[Path, int] = {}
        self.arrays: dict[Path, int] = {}

    # -- low-level helpers ------------------------------------------------------------
    def peek(self, k: int = 0) -> str:
        j = self.i + k
        return self.s[j] if j < len(self.s) else ""

    def advance(self, n: int = 1) -> None:
        for _ in range(n):
            if self.i < len(self.s) and self.s[self.i] == "\n":
                self.line += 1
                self.line_start = self.i + 1
            self.i += 1

    def here(self) -> tuple[int, int]:
        return self.line, self.i - self.line_start + 1

    def skip_ws(self, newlines: bool = False) -> None:
        while self.i < len(self.s):
            c = self.s[self.i]
            if c in " \t\r" or (newlines and c == "\n"):
                self.advance()
            elif c == "#":
                while self.i < len(self.s) and self.s[self.i] != "\n":
                    self.advance()
            else:
                break

    def record(self, path: Path, pos: tuple[int, int]) -> None:
        self.map.positions.setdefault(path, pos)

    # -- keys -------------------------------------------------------------------------------
    def key_part(self) -> str:
        c = self.peek()
        if c == '"':
            return self.basic_string()
        if c == "'":
            return self.literal_string()
        start = self.i
        while self.peek() and self.peek() in _BARE:
            self.advance()
        return self.s[start:self.i]

    def dotted_key(self) -> list[str]:
        parts = [self.key_part()]
        self.skip_ws()
        while self.peek() == ".":
            self.advance()
            self.skip_ws()
            parts.append(self.key_part())
            self.skip_ws()
        return parts

    # -- strings ----------------------------------------------------------------------------
    def basic_string(self) -> str:
        if self.s.startswith('"""', self.i):
            self.advance(3)
            start = self.i
            while self.i < len(self.s) and not (self.s.startswith('"""', self.i)
                                                and not self.s.startswith('""""', self.i)):
                if self.peek() == "\\":
                    self.advance()
                self.advance()
            out = self.s[start:self.i]
            self.advance(3)
            return out
        self.advance()
        start = self.i
        while self.i < len(self.s) and self.peek() not in '"\n':
            if self.peek() == "\\":
                self.advance()
            self.advance()
        raw = self.s[start:self.i]
        self.advance()
        return _unescape(raw)

    def literal_string(self) -> str:
        if self.s.startswith("'''", self.i):
            self.advance(3)
            start = self.i
            while self.i < len(self.s) and not (self.s.startswith("'''", self.i)
                                                and not self.s.startswith("''''", self.i)):
                self.advance()
            out = self.s[start:self.i]
            self.advance(3)
            return out
        self.advance()
        start = self.i
        while self.i < len(self.s) and self.peek() != "'":
            self.advance()
        out = self.s[start:self.i]
        self.advance()
        return out

    # -- values -----------------------------------------------------------------------------
    def value(self, path: Path) -> None:
        c = self.peek()
        if c == "{":
            self.inline_table(path)
        elif c == "[":
            self.array(path)
        elif c == '"':
            self.basic_string()
        elif c == "'":
            self.literal_string()
        else:
            while self.peek() and self.peek() not in ",]}\n#":
                self.advance()

    def inline_table(self, path: Path) -> None:
        self.advance()  # {
        self.skip_ws(newlines=True)
        while self.peek() and self.peek() != "}":
            pos = self.here()
            keys = self.dotted_key()
            full = path + tuple(keys)
            for depth in range(1, len(keys) + 1):
                self.record(path + tuple(keys[:depth]), pos)
            self.skip_ws()
            if self.peek() == "=":
                self.advance()
            self.skip_ws()
            self.value(full)
            self.skip_ws(newlines=True)
            if self.peek() == ",":
                self.advance()
                self.skip_ws(newlines=True)
        self.advance()  # }

    def array(self, path: Path) -> None:
        self.advance()  # [
        index = 0
        self.skip_ws(newlines=True)
        while self.peek() and self.peek() != "]":
            self.record((*path, index), self.here())
            self.value((*path, index))
            self.skip_ws(newlines=True)
            if self.peek() == ",":
                self.advance()
                self.skip_ws(newlines=True)
            index += 1
        self.advance()  # ]

    # -- document ---------------------------------------------------------------------------
    def resolve(self, keys: list[str], new_array_item: bool) -> Path:
        resolved: list[str | int] = []
        for n, key in enumerate(keys):
            resolved.append(key)
            last = n == len(keys) - 1
            t = tuple(resolved)
            if last and new_array_item:
                count = self.aot_count.get(t, 0)
                self.aot_count[t] = count + 1
                resolved.append(count)
            elif t in self.aot_count:
                resolved.append(self.aot_count[t] - 1)
        return tuple(resolved)

    def document(self) -> PositionMap:
        table: Path = ()
        while self.i < len(self.s):
            self.skip_ws(newlines=True)
            if self.i >= len(self.s):
                break
            pos = self.here()
            if self.peek() == "[":
                is_aot = self.peek(1) == "["
                self.advance(2 if is_aot else 1)
                self.skip_ws()
                keys = self.dotted_key()
                self.skip_ws()
                self.advance(2 if is_aot else 1)
                table = self.resolve(keys, is_aot)
                for depth in range(1, len(table) + 1):
                    self.record(table[:depth], pos)
                self.map.positions[table] = pos  # the header itself, even if seen as a parent before
            else:
                keys = self.dotted_key()
                full = table + tuple(keys)
                for depth in range(1, len(keys) + 1):
                    self.record(table + tuple(keys[:depth]), pos)
                self.skip_ws()
                if self.peek() == "=":
                    self.advance()
                self.skip_ws()
                self.value(full)
            # rest of the line (comment)
            self.skip_ws()
            if self.peek() == "\n":
                self.advance()
            elif self.peek() and self.peek() not in "[":
                # unexpected text: skip the line rather than loop forever
                while self.peek() and self.peek() != "\n":
                    self.advance()
        return self.map


def scan_positions(text: str) -> PositionMap:
    """Build the position map of a TOML document (which must already parse with tomllib)."""
    return _Scanner(text).document()
