"""One exception family for the whole tool.

Every input error names the file, the line (or feature id) and the field, and says why.
Subclasses also inherit the built-in exception a Python user would expect, so
``except ValueError`` keeps working around our calls.

The command line prints an :class:`InventoryError` as one line and exits with its
``exit_code`` (2 for bad input, 1 for a failed run); ``--verbose`` shows the traceback.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

__all__ = [
    "InventoryError",
    "InputError",
    "InputErrors",
    "Problem",
    "ConfigError",
    "CRSError",
    "PipelineError",
    "LedgerError",
    "PeriodLockedError",
    "LedgerInputError",
    "RunError",
    "InventoryWarning",
    "CoverageWarning",
    "InputWarning",
]

EXIT_OK = 0
EXIT_RUN_FAILED = 1
EXIT_BAD_INPUT = 2


@dataclass(frozen=True)
class Problem:
    """One thing wrong with one input: where it is and why.

    ``where`` is a line number for tables, a feature id for layers, or ``None`` for a whole
    file. ``severity`` is ``"error"`` or ``"warning"``.
    """

    path: str
    where: str | int | None
    field: str | None
    why: str
    severity: str = "error"

    def __str__(self) -> str:
        loc = self.path
        if self.where is not None:
            loc += f" line {self.where}" if isinstance(self.where, int) else f" {self.where}"
        if self.field:
            loc += f": {self.field}"
        return f"{loc}: {self.why}"


class InventoryError(Exception):
    """Raised when the tool cannot do what was asked; base of every error of ours."""

    exit_code = EXIT_RUN_FAILED


class InputError(InventoryError, ValueError):
    """Raised when one input is wrong: names file, line or feature, field and why."""

    exit_code = EXIT_BAD_INPUT

    def __init__(
        self,
        path: str | Path,
        why: str,
        *,
        line: int | None = None,
        feature: str | None = None,
        field: str | None = None,
    ) -> None:
        self.path = str(path)
        self.line = line
        self.feature = feature
        self.field = field
        self.why = why
        where: str | int | None = line if line is not None else feature
        self.problem = Problem(self.path, where, field, why)
        super().__init__(str(self.problem))


class InputErrors(InventoryError, ValueError):
    """Raised when validation found one or more problems; carries all of them."""

    exit_code = EXIT_BAD_INPUT

    def __init__(self, problems: Sequence[Problem]) -> None:
        self.problems = list(problems)
        errors = [p for p in self.problems if p.severity == "error"]
        head = f"{len(errors)} problem(s) in the input"
        super().__init__(head + ("\n" + "\n".join(str(p) for p in errors) if errors else ""))

    @classmethod
    def from_problems(cls, problems: Iterable[Problem]) -> "InputErrors":
        return cls(list(problems))


class ConfigError(InputError):
    """Raised when site.toml is missing, unreadable or breaks its schema."""


class CRSError(InputError):
    """Raised when a coordinate reference system is unknown, unusable for volumes, or has no transform."""


class PipelineError(InventoryError, ValueError):
    """Raised when a processing pipeline names an unknown stage or option, or a stage fails."""

    exit_code = EXIT_BAD_INPUT


class LedgerError(InventoryError, RuntimeError):
    """Raised when the ledger cannot be read or written consistently."""


class PeriodLockedError(LedgerError):
    """Raised when a closed period would be closed again without being reopened."""

    exit_code = EXIT_BAD_INPUT


class LedgerInputError(InputError, LedgerError):
    """Raised when the ledger the input names cannot be used: a ledger file that is not a
    SQLite database, a shared ledger's URL whose server cannot be reached. Bad input (exit
    2, naming where the ledger was given) that ``except LedgerError`` still catches."""


class RunError(InventoryError, RuntimeError):
    """Raised when a step of a run failed for a reason other than bad input."""


class InventoryWarning(UserWarning):
    """Base of the warnings the tool issues."""


class CoverageWarning(InventoryWarning):
    """Issued when part of a pile or survey is not covered by scan data."""


class InputWarning(InventoryWarning):
    """Issued when an input is usable but suspicious (e.g. a pile outside every survey)."""
