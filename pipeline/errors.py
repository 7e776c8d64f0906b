"""One exception tree for everything edgeproof refuses, each with its exit code."""

from __future__ import annotations

__all__ = [
    "EdgeproofError",
    "ConfigError",
    "DataError",
    "LimitError",
    "LockHeldError",
    "CacheWriteError",
    "EXIT_OK",
    "EXIT_FAILURE",
    "EXIT_USAGE",
    "EXIT_DATA",
    "EXIT_LOCKED",
    "EXIT_LIMIT",
    "EXIT_CHANGED",
]

EXIT_OK = 0
EXIT_FAILURE = 1
EXIT_USAGE = 2
EXIT_DATA = 3
EXIT_LOCKED = 4
EXIT_LIMIT = 5
EXIT_CHANGED = 6


class EdgeproofError(Exception):
    """Base of every error edgeproof raises on purpose; the message is one line with the fix."""

    exit_code = EXIT_FAILURE


class ConfigError(EdgeproofError, ValueError):
    """The configuration or the command line is wrong (exit code 2)."""

    exit_code = EXIT_USAGE


class DataError(EdgeproofError, ValueError):
    """The input data cannot be used as it is (exit code 3)."""

    exit_code = EXIT_DATA


class LimitError(DataError):
    """A configured size limit was exceeded (exit code 5), before the machine runs out of memory."""

    exit_code = EXIT_LIMIT


class LockHeldError(EdgeproofError):
    """Another run holds the lock on this output folder (exit code 4)."""

    exit_code = EXIT_LOCKED


class CacheWriteError(EdgeproofError):
    """A stage cache entry could not be written (disk full, no permission); exit code 1."""
