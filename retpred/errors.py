"""One exception family for the project.

Every user-facing error carries where it happened (file, line, field) so the CLI can print
one line and exit with code 2. Internal errors are plain exceptions and exit with code 1.
"""

from __future__ import annotations


class RetpredError(Exception):
    """Base class of every error retpred raises on purpose."""


class InputError(ValueError, RetpredError):
    """Bad user input: a file, a row or a field that cannot be used.

    Parameters
    ----------
    message:
        What is wrong and, where possible, how to fix it.
    path, line, field:
        Where it is. ``line`` is 1-based as an editor shows it.
    """

    def __init__(
        self,
        message: str,
        *,
        path: str | None = None,
        line: int | None = None,
        field: str | None = None,
    ) -> None:
        self.message = message
        self.path = None if path is None else str(path)
        self.line = line
        self.field = field
        super().__init__(self.one_line())

    def one_line(self) -> str:
        where = []
        if self.path:
            where.append(self.path)
        if self.line is not None:
            where.append(f"line {self.line}")
        if self.field:
            where.append(f"field '{self.field}'")
        prefix = ", ".join(where)
        text = " ".join(str(self.message).split())
        return f"{prefix}: {text}" if prefix else text


class MethodError(InputError):
    """An invalid or physically impossible chromatographic method."""


class ModelFileError(InputError):
    """A model file that is missing, unsafe, corrupt or from another version."""
