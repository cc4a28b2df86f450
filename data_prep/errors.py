"""The project's small exception hierarchy.

Every error a user can cause derives from :class:`InputError` and carries the
file, the column, the first offending rows and the fix, so that the command
line can print one clear message and exit with code 2.  The hierarchy lives in
the bottom layer so every layer above can raise and catch the same classes.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

__all__ = [
    "LiftpoolError",
    "InputError",
    "ConfigError",
    "BadRow",
    "MAX_ROWS_SHOWN",
]

#: How many offending rows an error message lists.
MAX_ROWS_SHOWN = 5


@dataclass(frozen=True)
class BadRow:
    """One offending row: its 1-based data row number (header excluded) and what is wrong."""

    row: int
    value: str

    def render(self) -> str:
        return f"row {self.row}: {self.value}"


class LiftpoolError(Exception):
    """Base class of every error liftpool raises on purpose.

    Attributes
    ----------
    exit_code : int
        The process exit code the command line uses for this error.
    """

    exit_code = 1


@dataclass
class InputError(LiftpoolError):
    """Bad input: a file, a column, a value, an option.

    Parameters
    ----------
    problem : str
        What is wrong, as one sentence.
    file : str, optional
        The file (or table) the problem is in.
    column : str, optional
        The column the problem is in.
    rows : sequence of BadRow, optional
        The first offending rows.
    fix : str, optional
        What the user should do.
    n_bad : int, optional
        How many rows are affected in total (when more than are listed).
    """

    problem: str
    file: str | None = None
    column: str | None = None
    rows: Sequence[BadRow] = field(default_factory=tuple)
    fix: str | None = None
    n_bad: int | None = None

    exit_code = 2

    def __post_init__(self) -> None:
        self.rows = tuple(self.rows)[:MAX_ROWS_SHOWN]
        super().__init__(self.render())

    def __str__(self) -> str:  # dataclass would otherwise replace it
        return self.render()

    def render(self) -> str:
        """The full multi-line message shown to the user."""
        where = []
        if self.file:
            where.append(str(self.file))
        if self.column:
            where.append(f"column '{self.column}'")
        head = ", ".join(where)
        lines = [f"{head}: {self.problem}" if head else self.problem]
        for r in self.rows:
            lines.append("  " + r.render())
        if self.n_bad is not None and self.n_bad > len(self.rows) and self.rows:
            lines.append(f"  ... {self.n_bad - len(self.rows)} more")
        if self.fix:
            lines.append(f"  fix: {self.fix}")
        return "\n".join(lines)


class ConfigError(InputError):
    """A setting with an invalid value; the message lists the valid choices."""

    @classmethod
    def invalid_choice(
        cls, name: str, value: object, choices: Iterable[str], where: str | None = None
    ) -> ConfigError:
        valid = ", ".join(repr(c) for c in choices)
        return cls(
            problem=f"invalid value {value!r} for '{name}'; valid choices are {valid}",
            file=where,
            fix=f"set '{name}' to one of {valid}",
        )

    @classmethod
    def unknown_keys(cls, keys: Iterable[str], valid: Iterable[str], where: str | None = None) -> ConfigError:
        bad = ", ".join(repr(k) for k in sorted(keys))
        ok = ", ".join(sorted(valid))
        return cls(
            problem=f"unknown setting(s) {bad}; valid settings are: {ok}",
            file=where,
            fix="remove or rename the unknown settings",
        )
