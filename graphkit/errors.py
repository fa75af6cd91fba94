"""Error and warning classes shared by every stage.

Anything derived from :class:`InputError` is the user's to fix (bad config, bad table) and the command line turns it
into a one-line message with exit code 2. Everything else is a bug or an environment failure (exit code 1).
"""

from __future__ import annotations


class InputError(ValueError):
    """Bad input or configuration: reported in one line, exit code 2, nothing is published."""


class ConfigError(InputError):
    """The configuration file, a ``--set`` override or a function parameter is invalid."""


class EdgeTableError(InputError):
    """An edge table is missing, unreadable or holds rows the pipeline cannot use."""


class StoreError(InputError):
    """The embedding store is missing, locked, or has no such version."""


class GraphDataWarning(UserWarning):
    """Input that was repaired rather than rejected (duplicates merged, self-loops dropped, ...)."""


class GateFailure(Exception):
    """A run's quality figures failed a configured gate: recorded as a failed version, exit code 3."""

    def __init__(self, message: str, version: int | None = None, metrics: dict | None = None):
        super().__init__(message)
        self.version = version
        self.metrics = metrics or {}
