"""Exceptions raised by metricc.

Every problem with a spec raises :class:`SpecError`; problems building or loading compiled
kernels raise :class:`BuildError`. Both carry enough context for a one-line, compiler-style
message (``path:line:column: error: ...``) that editors and build logs can jump to.
"""
from __future__ import annotations

import re

# Longest name shown in full in a message; longer ones are cut (a hostile spec may hold a
# 300,000-character key, and a message should stay one readable line).
SHOWN_NAME_LENGTH = 60
_PLAIN = re.compile(r"[A-Za-z0-9_.\-]+")


def quoted(name: object) -> str:
    """``name`` in quotes as Python's repr writes it (newlines and other control characters
    escaped, so a message stays on one line), cut to SHOWN_NAME_LENGTH characters."""
    text = str(name)
    if len(text) > SHOWN_NAME_LENGTH:
        return repr(text[:SHOWN_NAME_LENGTH]) + f"... ({len(text)} characters)"
    return repr(text)


def shown(name: object) -> str:
    """``name`` as is when it is plain (letters, digits, ``_ . -``) and short, else
    :func:`quoted`: keys such as ``r.r`` read naturally, odd ones cannot break the line."""
    text = str(name)
    if len(text) <= SHOWN_NAME_LENGTH and _PLAIN.fullmatch(text):
        return text
    return quoted(text)


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
        table = None if self.table is None else shown(self.table)
        key = None if self.key is None else shown(self.key)
        if table is not None and key is not None:
            place = f"[{table}] {key}: "
        elif table is not None:
            place = f"[{table}]: "
        elif key is not None:
            place = f"{key}: "
        else:
            place = ""
        return f"{where}: error: {place}{self.reason}"


class BuildError(RuntimeError):
    """Generating, compiling or loading the kernels of a valid spec failed."""
