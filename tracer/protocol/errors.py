"""Problems found in a YAML file, and the exceptions that carry all of them at once."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class Problem:
    """One thing wrong with a file.

    ``file`` is the file as the user named it (or ``"<text>"``), ``line`` is 1-based (``None``
    when the problem is about the whole file), ``key`` is the key path such as
    ``steps[1].points`` (``""`` for the whole document), ``value`` the offending value as
    read (``None`` when there is none), ``allowed`` what would have been accepted, and
    ``message`` the full sentence shown to the user.
    """

    file: str
    line: int | None
    key: str
    value: Any
    allowed: str
    message: str

    def __str__(self) -> str:
        where = self.file if self.line is None else f"{self.file}:{self.line}"
        if self.key:
            return f"{where}: {self.key}: {self.message}"
        return f"{where}: {self.message}"


class ProblemReport(ValueError):
    """Base of the validation errors: every problem found, in file order."""

    what = "file"

    def __init__(self, problems: list[Problem]):
        self.problems = sorted(
            problems, key=lambda p: (p.file, p.line if p.line is not None else 0, p.key)
        )
        super().__init__(self._text())

    def _text(self) -> str:
        n = len(self.problems)
        files = sorted({p.file for p in self.problems})
        head = f"{n} problem{'s' if n != 1 else ''} in {self.what} {', '.join(files)}:"
        return "\n".join([head] + [f"  {p}" for p in self.problems])

    def __str__(self) -> str:
        return self._text()


class ProtocolError(ProblemReport):
    """A protocol that cannot be loaded, validated or compiled. ``.problems`` lists them all."""

    what = "protocol"
