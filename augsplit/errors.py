"""One exception family. Every user-facing error names what went wrong and where.

The CLI maps `exit_code` to the process exit status and prints `str(err)` as one line.
"""

from __future__ import annotations


class AugsplitError(Exception):
    """Base of every error augsplit raises on purpose. `where` is a key path, file or row."""

    exit_code = 2

    def __init__(self, message: str, where: str | None = None, hint: str | None = None):
        self.message = message
        self.where = where
        self.hint = hint
        super().__init__(self.__str__())

    def __str__(self) -> str:
        text = f"{self.where}: {self.message}" if self.where else self.message
        if self.hint:
            text += f" (hint: {self.hint})"
        return text


class SpecError(AugsplitError):
    """The spec is malformed or asks for something impossible; `where` is the key path."""


class GuaranteeError(SpecError):
    """The planner cannot prove a guarantee the spec states; the message carries the numbers."""


class SourceError(AugsplitError):
    """An object source or background (a file or folder) is unusable; `where` names the file."""


class DatasetError(AugsplitError):
    """A dataset folder, manifest, table or predictions file is unusable; `where` names it."""


class VerificationError(AugsplitError):
    """A produced dataset does not match what it claims (verify / audit failure): exit 1."""

    exit_code = 1
