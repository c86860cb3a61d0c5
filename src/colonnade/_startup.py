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


def _interrupted(signum: int, frame: FrameType | None) -> None:
    # Nothing has been read or written yet, so leave at once: os.write and os._exit do not
    # run Python's unwinding, which inside an import could print the import's traceback.
    os.write(2, STARTUP_INTERRUPTED.encode())
    os._exit(130)


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
    sys.exit(code)
