"""The one exception type for mistakes the user can fix.

A :class:`UserError` carries a single message that names the file, column, key or
candidate concerned, what is wrong and how to fix it. The command line prints the
message alone (no traceback); library callers can catch it.
"""

from __future__ import annotations

import re


class UserError(Exception):
    """A problem in the user's input (data, configuration, candidate files)."""

    def __init__(self, message: str) -> None:
        # one line, whatever the names in it hold (column names may contain line breaks)
        message = re.sub(r"\s*[\r\n]+\s*", " ", message).strip()
        super().__init__(message)
        self.message = message

    def __str__(self) -> str:  # pragma: no cover - trivial
        return self.message


class SamplingError(RuntimeError):
    """Stan could not run a candidate (initialisation failed, an exception in the
    program, ...). The message carries Stan's own words."""
