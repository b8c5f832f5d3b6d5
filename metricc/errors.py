"""Exceptions raised by metricc.

Every problem with a spec raises :class:`SpecError`; problems building or loading compiled
kernels raise :class:`BuildError`. Both carry enough context for a one-line, compiler-style
message (``path:line:column: error: ...``) that editors and build logs can jump to.
"""
from __future__ import annotations


class MetriccWarning(UserWarning):
    """Warnings from metricc (for example: no working C compiler, falling back to NumPy)."""


class SpecError(ValueError):
    """A spec is invalid.

    Attributes:
        path: the spec's file name, or ``"<string>"`` for text passed to :func:`metricc.loads`.
        table: the TOML table the problem is in (``"metric"``, ``"define"``, ...) or ``None`` for
            a top-level key.
        key: the key inside that table (``"r.r"``, ``"Sigma"``) or ``None``.
        line, column: 1-based position in the file, when it could be located.
        reason: the bare description of the problem, with any hint.
        context: the offending source line with a caret under the column ("" if unknown).
    """

    def __init__(self, reason: str, *, path: str = "<string>", table: str | None = None,
                 key: str | None = None, line: int | None = None, column: int | None = None,
                 context: str = ""):
        self.reason = reason
        self.path = path
        self.table = table
        self.key = key
        self.line = line
        self.column = column
        self.context = context
        super().__init__(self._format())

    def _format(self) -> str:
        where = self.path
        if self.line is not None:
            where += f":{self.line}"
            if self.column is not None:
                where += f":{self.column}"
        if self.table is not None and self.key is not None:
            place = f"[{self.table}] {self.key}: "
        elif self.table is not None:
            place = f"[{self.table}]: "
        elif self.key is not None:
            place = f"{self.key}: "
        else:
            place = ""
        return f"{where}: error: {place}{self.reason}"


class BuildError(RuntimeError):
    """Generating, compiling or loading the kernels of a valid spec failed."""
