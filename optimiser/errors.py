"""Exception types raised by the rqnet application.

``CaseError`` is raised while reading a case folder; it always says which file, which row (1-based as in a
spreadsheet, the header being row 1), which column and which rule was broken.
``InfeasibleError`` is raised when the inputs are valid but ask for something that cannot
be met; ``SolverError`` when a numerical method fails.
"""

from __future__ import annotations

from typing import Any

__all__ = ["RqnetError", "CaseError", "InfeasibleError", "SolverError", "OutputError"]


class RqnetError(Exception):
    """Base class of every error rqnet raises on purpose."""


class CaseError(RqnetError):
    """A case folder (or a file given on the command line) breaks a rule.

    Parameters
    ----------
    file : str
        File name as the planner knows it (e.g. ``"items.csv"``).
    rule : str
        The rule that was broken, in words.
    row : int, optional
        1-based row as shown by a spreadsheet (header = row 1, first data row = 2).
    column : str, optional
        Column name (for ``case.toml``: the key, e.g. ``"service.target"``).
    value : object, optional
        The offending value, shown in the message.

    Examples
    --------
    >>> str(CaseError("items.csv", "must not be negative", row=4, column="unit_cost", value="-3"))
    "items.csv, row 4, column 'unit_cost': must not be negative (found '-3')"
    """

    def __init__(
        self,
        file: str,
        rule: str,
        *,
        row: int | None = None,
        column: str | None = None,
        value: Any = None,
    ) -> None:
        self.file = file
        self.rule = rule
        self.row = row
        self.column = column
        self.value = value
        super().__init__(self._message())

    def _message(self) -> str:
        parts = [self.file]
        if self.row is not None:
            parts.append(f"row {self.row}")
        if self.column is not None:
            word = "key" if self.file.endswith(".toml") else "column"
            parts.append(f"{word} '{self.column}'")
        text = ", ".join(parts) + f": {self.rule}"
        if self.value is not None:
            text += f" (found {self.value!r})"
        return text


class InfeasibleError(RqnetError):
    """Valid inputs that ask for something no policy can deliver."""


class SolverError(RqnetError):
    """A numerical method failed (did not converge, produced non-finite values)."""


class OutputError(RqnetError):
    """The output folder cannot be written safely (e.g. it holds files rqnet did not write)."""
