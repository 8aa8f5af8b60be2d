"""Errors a user can cause and fix.

The CLI turns every :class:`SwarmAuditError` into one sentence on stderr and
exit code 2; anything else is a bug in swarmaudit and may show a traceback.
"""

from __future__ import annotations

import os


class SwarmAuditError(Exception):
    """A problem with the user's input or options, worded for the user."""


class InputError(SwarmAuditError):
    """A file (or a dataset inside it) that cannot be used as given."""

    def __init__(self, path, problem: str, hint: str | None = None):
        self.path = os.fspath(path) if path is not None else None
        self.problem = problem
        self.hint = hint
        text = f"{self.path}: {problem}" if self.path else problem
        if hint:
            text += f" ({hint})"
        super().__init__(text)

    def __reduce__(self):
        # what another process (a worker that opened the file) sends back: rebuilt from its parts
        return (type(self), (self.path, self.problem, self.hint))


class OptionError(SwarmAuditError):
    """A command-line option or setting that does not make sense."""


class DataWarning(UserWarning):
    """Data is usable but suspicious (NaN positions, particles outside the domain...)."""
