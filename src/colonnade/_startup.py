"""The console script's first code: Ctrl-C during start-up prints one sentence.

Starting ``colonnade`` imports the command line and, for most verbs, torch: seconds in
which Ctrl-C would otherwise end in a Python traceback printed from inside an import.
This module imports nothing of colonnade's beyond the package itself (whose ``__init__``
is a few names), installs a SIGINT handler that prints one sentence and exits 130, and
only then imports the command line. ``cli.main`` puts Python's own handler back as the
first thing it does inside its ``try``, from where Ctrl-C is answered as usual (the
handler is found there by its module's name, since the command line cannot import this
module above it).

What stays unavoidable: the interpreter's own start-up (before Python runs any code of
colonnade's: loading the standard library, ``site``, the package's ``__init__``), a few
tens of milliseconds in which Python's default handler is still in force.
"""

from __future__ import annotations

import os
import signal
import sys
from types import FrameType

__all__ = ["main", "STARTUP_INTERRUPTED"]

STARTUP_INTERRUPTED = "colonnade: interrupted while starting; nothing was changed\n"
INTERRUPTED_EXIT = 130  # 128 + SIGINT, the shells' convention for a job ended by Ctrl-C


def _interrupted(signum: int, frame: FrameType | None) -> None:
    # Nothing has been read or written yet, so leave at once: os.write and os._exit do not
    # run Python's unwinding, which inside an import could print the import's traceback.
    os.write(2, STARTUP_INTERRUPTED.encode())
    os._exit(INTERRUPTED_EXIT)


# Only where Python's own handler is in force: a process started with SIGINT ignored
# (a background job of a non-interactive shell) keeps ignoring it.
if signal.getsignal(signal.SIGINT) is signal.default_int_handler:
    signal.signal(signal.SIGINT, _interrupted)


def main() -> None:
    """The console script ``colonnade`` (and ``python -m colonnade``)."""
    from .cli.main import main as cli_main  # after the handler above, not at import time

    code = cli_main()
    # The verb has finished and said so; a Ctrl-C while the interpreter shuts down
    # (torch's teardown takes a moment) has nothing left to stop.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    if code == INTERRUPTED_EXIT:
        _leave_after_interrupt()
    sys.exit(code)


def _leave_after_interrupt() -> None:
    """Exit 130 at once, after the sentence, past the interpreter's own finalisation.

    CPython remembers a KeyboardInterrupt that left a nested evaluation (code that a C
    extension runs through ``PyRun_String``, as some do while torch loads) even when the
    command line caught it later; under ``python -m colonnade`` the interpreter then ends
    by killing itself with SIGINT at exit, so the caller sees a signal death instead of
    130. Every verb has released its locks and temporary files by the time it returns
    (they are context managers), so nothing is left for finalisation to do here."""
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):  # a closed pipe or stream: the sentence is all
            pass
    os._exit(INTERRUPTED_EXIT)
