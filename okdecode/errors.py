"""The one family of errors okdecode raises on purpose.

Only :mod:`okdecode.cli` turns these into a single line on stderr and exit status 2.
"""

from __future__ import annotations


class OkDecodeError(Exception):
    """Base of every error okdecode raises on purpose (ParameterError, CaptureError, ...)."""


class ParameterError(OkDecodeError, ValueError):
    """An option or argument is out of its meaningful range."""

    def __init__(self, source: object, problem: str, *, expected: str | None = None):
        self.source, self.problem, self.expected = str(source), problem, expected
        super().__init__(f"{source}: {problem}" + (f"; expected {expected}" if expected else ""))


class CaptureError(OkDecodeError, ValueError):
    """A recording cannot be read as what it claims to be."""

    def __init__(self, source: object, problem: str, *, expected: str | None = None):
        self.source, self.problem, self.expected = str(source), problem, expected
        super().__init__(f"{source}: {problem}" + (f"; expected {expected}" if expected else ""))
