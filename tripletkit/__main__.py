"""``python -m tripletkit`` and the ``tripletkit`` command (its console-script entry point).

The command line, and through it numpy, pyarrow and faiss, is imported inside this function's
handler of Ctrl-C: an interrupt while the command is still starting up is one line and exit code
130, like an interrupt later on (``tripletkit/__init__.py`` imports nothing heavy).
"""

import sys


def main(argv=None):
    """Run the ``tripletkit`` command; return its exit code (see :func:`tripletkit.cli.main`)."""
    try:
        from .cli import main as run

        code = run(argv)
    except KeyboardInterrupt:
        if "--debug" in (sys.argv[1:] if argv is None else argv):
            raise
        from ._errors import INTERRUPTED

        print(INTERRUPTED, file=sys.stderr, flush=True)
        code = 130
    if code == 130:
        _interrupt_was_handled()
    return code


def _interrupt_was_handled():
    """Tell CPython that the KeyboardInterrupt was handled, so the exit code stays 130.

    A KeyboardInterrupt that escapes code run by ``exec`` of a string (dataclasses and
    namedtuples build their methods that way while modules import) sets CPython's "unhandled
    KeyboardInterrupt" flag even when a caller handles it; at exit the interpreter then kills
    itself with SIGINT (exit status -2) instead of returning our 130. Each ``exec`` of a string
    starts by clearing that flag, so an empty one clears it (a no-op where there is no such flag).
    """
    exec("")  # noqa: S102 (an empty string: nothing runs)


if __name__ == "__main__":
    sys.exit(main())
