"""One error hierarchy for the tracker.

Every error a user can trigger derives from :class:`KrtError` and also from a
builtin (``ValueError``, ``PermissionError`` ...), so callers may catch either.
Messages are built from typed fields and always fit on one line, so the CLI and
the dashboard can show them verbatim, without a traceback.
"""

from __future__ import annotations

from dataclasses import dataclass


class KrtError(Exception):
    """Base class of every error the tracker reports to a user."""

    def one_line(self) -> str:
        return " ".join(str(self).split())


class UnitError(KrtError, ValueError):
    """A quantity whose unit is unknown, of the wrong dimension, or out of range."""


@dataclass(frozen=True)
class Location:
    file: str
    line: int | None = None
    column: str | None = None

    def __str__(self) -> str:
        text = self.file
        if self.line is not None:
            text += f":{self.line}"
        if self.column:
            text += f": {self.column}"
        return text


class InputError(KrtError, ValueError):
    """Bad input at a known place: ``file:line: column: message``."""

    def __init__(self, message: str, file: str = "", line: int | None = None, column: str | None = None):
        self.message = message
        self.location = Location(file, line, column) if file else None
        super().__init__(f"{self.location}: {message}" if self.location else message)


class ImportErrors(KrtError, ValueError):
    """Several :class:`InputError` found while validating one import; nothing was written."""

    def __init__(self, errors: list[InputError]):
        self.errors = list(errors)
        first = self.errors[0] if self.errors else "no errors"
        more = f" (and {len(self.errors) - 1} more)" if len(self.errors) > 1 else ""
        super().__init__(f"{first}{more}")


class FitError(KrtError, ValueError):
    """A fit that cannot be done on the data given (too few points, no convergence ...)."""


class NotFoundError(KrtError, LookupError):
    """A compound, program, user or record that does not exist."""


class PermissionDenied(KrtError, PermissionError):
    """The acting user's role does not allow the action."""


class GateRefused(KrtError, ValueError):
    """A stage transition refused by the gate, with the reasons."""

    def __init__(self, message: str, reasons: list[str] | None = None):
        self.reasons = list(reasons or [])
        super().__init__(message)


class IntegrityError(KrtError, RuntimeError):
    """The audit trail or a stored record failed an integrity check."""
