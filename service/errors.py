"""Where the error hierarchy meets the outside: CLI messages and exit codes (HTTP comes later).

This is the one place that maps :class:`features.errors.DipshapeError` families to what a user
sees; commands and routes never format errors themselves.
"""

from __future__ import annotations

from features.errors import DipshapeError, InputError, ParameterError

__all__ = ["EXIT_FAILURE", "EXIT_USAGE", "cli_exit_code", "cli_message"]

EXIT_FAILURE = 1
"""Exit code when the work ran but some of it failed (e.g. a segment could not be scored)."""
EXIT_USAGE = 2
"""Exit code for bad arguments or unusable input."""


def cli_exit_code(err: DipshapeError) -> int:
    """Exit code for an error that stopped a command."""
    return EXIT_USAGE if isinstance(err, InputError | ParameterError) else EXIT_FAILURE


def cli_message(err: DipshapeError) -> str:
    """One-line message for the terminal, e.g. ``error [too_few_points]: ...``."""
    return f"error [{err.code}]: {err.detail}"
