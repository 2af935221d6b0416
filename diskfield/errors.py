"""One error vocabulary for diskfield.

Every error a user can cause derives from :class:`DiskfieldError`; the CLI turns
them into one clear line per problem and exit status 2. Subclasses are also
``ValueError`` or ``TypeError`` so that ordinary ``except`` clauses still work.

Message shape (one line per problem)::

    FILE: row 7 (record 'AR-3'), column 'paleointensity': got -4.0; must be a positive number
    option '--spin': got 'maybe'; valid: body, record, none
"""
from __future__ import annotations

from dataclasses import dataclass

__all__ = [
    "DiskfieldError",
    "Problem",
    "CompilationError",
    "PriorFileError",
    "OptionError",
    "ConvergenceError",
    "CheckpointError",
]


@dataclass(frozen=True)
class Problem:
    """One located problem in an input file.

    Parameters
    ----------
    source : str
        File name (or ``"<input>"``).
    message : str
        What is wrong and what would be valid, e.g. ``"got -4.0; must be > 0"``.
    row : int or None
        1-based data row number (header excluded), if the problem is in a row.
    line : int or None
        1-based line number in the file, when known.
    record : str or None
        The row's ``record`` id, when known.
    column : str or None
        Column (or TOML table/key) concerned.
    """

    source: str
    message: str
    row: int | None = None
    line: int | None = None
    record: str | None = None
    column: str | None = None

    def __str__(self) -> str:
        where = [self.source]
        loc = []
        if self.row is not None:
            loc.append(f"row {self.row}")
        if self.line is not None:
            loc.append(f"line {self.line}")
        if self.record is not None:
            loc.append(f"record {self.record!r}")
        place = ", ".join(loc)
        if self.column is not None:
            place = f"{place}, column {self.column!r}" if place else f"column {self.column!r}"
        if place:
            where.append(place)
        return ": ".join(where) + ": " + self.message


class DiskfieldError(Exception):
    """Base class of every user-facing diskfield error."""

    def lines(self) -> list[str]:
        """The error as one line per problem (what the CLI prints)."""
        return [str(self)]


class _ProblemsError(DiskfieldError):
    """An error that carries every problem found, not just the first."""

    def __init__(self, problems: list[Problem] | Problem | str, source: str = "<input>"):
        if isinstance(problems, str):
            problems = [Problem(source, problems)]
        elif isinstance(problems, Problem):
            problems = [problems]
        self.problems = list(problems)
        super().__init__("\n".join(str(p) for p in self.problems))

    def lines(self) -> list[str]:
        return [str(p) for p in self.problems]


class CompilationError(_ProblemsError, ValueError):
    """A compilation file that cannot be read or fitted (all problems collected)."""


class PriorFileError(_ProblemsError, ValueError):
    """A prior TOML file with unknown keys, families, parameters or bad values."""


class OptionError(DiskfieldError, ValueError):
    """An invalid option or argument value.

    Parameters
    ----------
    option : str
        Option or argument name, e.g. ``"--spin"`` or ``"spin"``.
    got : object
        The value received.
    valid : str
        What is valid, e.g. ``"one of body, record, none"``.
    """

    def __init__(self, option: str, got: object, valid: str):
        self.option, self.got, self.valid = option, got, valid
        super().__init__(f"option {option!r}: got {got!r}; valid: {valid}")


class ConvergenceError(DiskfieldError, RuntimeError):
    """A sampler did not converge and ``--strict`` was given."""


class CheckpointError(DiskfieldError, ValueError):
    """A checkpoint that cannot be resumed (missing, corrupt, or from another configuration)."""
