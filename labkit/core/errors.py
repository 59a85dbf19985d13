"""The errors labkit raises, in one tree.

::

    LabkitError                     base of everything labkit raises on purpose
    ├── UnitError (ValueError)      a value with a missing, unknown or wrong-kind unit
    ├── LocationError (ValueError)  a location string that does not follow the grammar
    ├── ModelInputError (ValueError) a numeric model argument outside what the model accepts
    ├── UnknownNameError (KeyError) a quantity, element or step that does not exist
    ├── FileValidationError (ValueError)
    │                               one or more located problems in a bench, cart or template file
    └── CaptureError (ValueError)   a waveform capture that cannot give trustworthy readings
                                    (NaN samples, dropped samples, too short, too near Nyquist,
                                    too large, a malformed capture file)

Messages name what was expected and what was found; file errors also carry the
file, line and field path of every problem (:class:`Problem`).
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field


class LabkitError(Exception):
    """Base class of every error labkit raises on purpose."""


class UnitError(LabkitError, ValueError):
    """A value whose unit is missing, unknown, of the wrong kind, or a likely case slip."""


class LocationError(LabkitError, ValueError):
    """A location string that does not follow the location grammar."""


class ModelInputError(LabkitError, ValueError):
    """A numeric argument a model cannot accept (non-positive rating, unsorted time axis, ...)."""


class UnknownNameError(LabkitError, KeyError):
    """A name (quantity, element, step) that is not defined."""

    def __str__(self) -> str:  # KeyError would print the repr of the message
        return str(self.args[0]) if self.args else ""


def did_you_mean(word: str, choices: Iterable[str]) -> str:
    """Return ' (did you mean "x"?)' for the closest choice, or '' if none is close."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    if not close:
        lowered = {c.lower(): c for c in choices}
        if word.lower() in lowered:
            close = [lowered[word.lower()]]
    return f' (did you mean "{close[0]}"?)' if close else ""


@dataclass(frozen=True)
class Problem:
    """One located problem in a file.

    ``path`` is the field path inside the file as a tuple of keys and list
    indices, e.g. ``("line_sections", 2, "r")``; ``line`` is 1-based (0 when the
    problem concerns the file as a whole).
    """

    file: str
    line: int
    path: tuple[str | int, ...]
    message: str
    expected: str = ""
    found: str = ""
    column: int = 0
    code: str = "invalid"

    @property
    def field_path(self) -> str:
        """The field path written as ``line_sections[2].r``."""
        return format_path(self.path)

    def __str__(self) -> str:
        where = f"{self.file}:{self.line}" if self.line else self.file
        text = f"{where}: {self.field_path or '(file)'}: {self.message}"
        if self.expected:
            text += f"; expected {self.expected}"
        if self.found:
            text += f", found {self.found}"
        return text


def format_path(path: Sequence[str | int]) -> str:
    """Write a field path the way messages show it: ``steps[3].readings[0].unit``."""
    out = ""
    for part in path:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += f".{part}" if out else str(part)
    return out


@dataclass
class FileValidationError(LabkitError, ValueError):
    """All the problems found in one or more files, reported together."""

    problems: list[Problem] = field(default_factory=list)

    def __post_init__(self) -> None:
        super().__init__(self.__str__())

    def __str__(self) -> str:
        count = len(self.problems)
        head = f"{count} problem{'s' if count != 1 else ''} found"
        return head + ":\n" + "\n".join(f"  {p}" for p in self.problems)


class CaptureError(LabkitError, ValueError):
    """A waveform capture (or capture file) that cannot give trustworthy readings; the message says why."""
