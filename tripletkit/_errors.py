"""The one exception type that the command line turns into a one-line message and exit code 2."""

from __future__ import annotations

__all__ = ["TripletkitError", "TripletkitWarning", "Stopped", "INTERRUPTED"]

#: What the command prints on Ctrl-C (exit code 130), whenever it arrives.
INTERRUPTED = "interrupted: no output was written"


class TripletkitError(ValueError):
    """Bad input: the message says what is wrong, where, and what to do.

    The CLI prints ``error: <message>`` on one line and exits with code 2. The message must be a
    single line (no newline characters).
    """


class TripletkitWarning(UserWarning):
    """Legal but degenerate input (one identity, no impostor pairs, an empty regime).

    The result carries a null with a reason instead of a made-up number.
    """


class Stopped(Exception):
    """A task of a plan ended early because its run was stopped (another task failed, the caller
    was interrupted or went away); tasks raise it when their ``stopped()`` says so."""
