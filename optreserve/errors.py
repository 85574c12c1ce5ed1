"""One exception type per failure kind; only the CLI turns them into exit codes."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Problem:
    """One finding about the input, located as precisely as the input allows."""

    file: str
    message: str
    row: int | None = None  # physical line number in the file, header = 1
    column: str | None = None

    def __str__(self) -> str:
        where = self.file
        if self.row is not None:
            where += f" row {self.row}"
        if self.column is not None:
            where += f" column {self.column}"
        return f"{where}: {self.message}"


class OptreserveError(Exception):
    """Base class of every error the tool raises on purpose."""

    exit_code = 1


class CaseError(OptreserveError):
    """The case cannot be read: one or more input problems (exit code 2)."""

    exit_code = 2

    def __init__(self, problems: list[Problem]):
        self.problems = list(problems)
        super().__init__("\n".join(str(p) for p in self.problems))


class InfeasibleError(OptreserveError):
    """No allocation meets the limits (exit code 3); carries what is short and where."""

    exit_code = 3

    def __init__(self, message: str, shortfalls: list[str] | None = None, diagnosis=None):
        self.shortfalls = list(shortfalls or [])
        self.diagnosis = diagnosis  # pandas DataFrame or None
        super().__init__(message)


class SolverError(OptreserveError):
    """The solver stopped without a usable answer for a reason other than infeasibility."""

    exit_code = 1


class VerificationError(OptreserveError):
    """The independent recalculation disagrees with the optimiser's own figures."""

    exit_code = 1
