"""User-facing exceptions.

Every exception a user can act on derives from :class:`RetrogradeError`. Its ``str`` is one
line: what is wrong, where (file, key, unit), and how to fix it. The CLI prints it and exits
with status 2; a traceback appears only with ``--debug``.
"""

from __future__ import annotations

__all__ = [
    "BijectionError",
    "ConfigError",
    "DataError",
    "FitError",
    "HostRepoError",
    "MissingDependencyError",
    "MissingFileError",
    "PluginError",
    "RetrogradeError",
]


class RetrogradeError(Exception):
    """A mistake the user can fix; printed as one line, exit status 2."""

    exit_status = 2

    def __str__(self) -> str:
        # Collapse accidental newlines so the message stays on one line.
        return " ".join(super().__str__().split())

    def prefixed(self, where: str) -> RetrogradeError:
        """A new error of the same kind with ``where: `` in front, unless it already
        starts so (raise it ``from`` this one).

        >>> str(ConfigError("study.models.m: bad").prefixed("study.models.m"))
        'study.models.m: bad'
        >>> str(ConfigError("bad").prefixed("study.models.m"))
        'study.models.m: bad'
        """
        text = str(self)
        return type(self)(text if text.startswith(f"{where}:") else f"{where}: {text}")


class ConfigError(RetrogradeError):
    """A config key, value or command-line option is invalid."""


class DataError(RetrogradeError):
    """Input data is missing, empty, malformed or inconsistent."""


class MissingFileError(DataError):
    """A file (or glob) an input names does not exist, or not yet (a host stage may write it)."""


class BijectionError(DataError):
    """An order transform failed to round-trip a unit."""


class FitError(RetrogradeError):
    """A model fit or an external trainer failed."""


class HostRepoError(RetrogradeError):
    """The host repository is not in a state the plug-in can work with."""


class MissingDependencyError(RetrogradeError):
    """An optional dependency is not installed."""


class PluginError(RetrogradeError):
    """A plug-in (order, source, family, tokenizer) raised or broke its contract."""
