"""Errors raised for bad input, carrying enough detail to fix the input.

Every input error names *where* (a field path, or a file, line and column), the
*value* that was given and *what would be valid*. The CLI turns any
:class:`InputError` into exit code 2; the REST service into a 4xx problem+json.
"""

from __future__ import annotations

from dataclasses import dataclass, field


class _Missing:
    """The value of a :class:`Problem` whose field was not given at all (unlike a null the
    user wrote, which is the value None)."""

    def __repr__(self) -> str:
        return "<missing>"


MISSING = _Missing()


@dataclass(frozen=True)
class Problem:
    """One thing wrong with an input: where, the value given, and what is valid."""

    where: str
    value: object
    expected: str

    def __str__(self) -> str:
        if isinstance(self.value, _Missing):
            return f"{self.where}: missing; {self.expected}"
        shown = (
            "null"  # what the user wrote in YAML or JSON
            if self.value is None
            else repr(self.value)
            if not isinstance(self.value, int) or abs(self.value) < 10**40
            else f"an integer of {len(str(abs(self.value)))} digits"
        )
        if len(shown) > 120:  # a long value is named, not echoed: the message stays one line
            shown = f"{shown[:100]}... ({len(shown)} characters)"
        return f"{self.where}: got {shown}; {self.expected}"


@dataclass
class InputError(ValueError):
    """Bad input from a user: one or more :class:`Problem` found together."""

    problems: list[Problem] = field(default_factory=list)
    title: str = "invalid input"

    def __post_init__(self) -> None:
        super().__init__(str(self))

    def __str__(self) -> str:
        if len(self.problems) == 1:
            return f"{self.title}: {self.problems[0]}"
        lines = [f"{self.title}: {len(self.problems)} problems"]
        lines += [f"  - {p}" for p in self.problems]
        return "\n".join(lines)

    @classmethod
    def single(cls, where: str, value: object, expected: str, title: str = "invalid input") -> "InputError":
        """Shortcut for an error with exactly one problem."""
        return cls([Problem(where, value, expected)], title)


class StorageError(RuntimeError):
    """The environment failed us, not the user's input: the storage cannot be read or
    written (a damaged journal found by ``stagefit storage check``, a full disk, a database
    away). The CLI turns it into exit code 4, the REST service into a 503 problem."""
