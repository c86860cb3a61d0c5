"""The command line's entry point: parse, run one verb, print any refusal as one sentence.

No logic lives here. Every expected failure is a ColonnadeError, printed as one sentence
with a non-zero exit code. Ctrl-C exits 130 with one of two sentences: before a commit's
point of no return the workspace is unchanged (it is only written at the end of an
action); a Ctrl-C that arrives during a commit is held until the commit is complete, and
the store then raises ``InterruptedAfterCommit`` so the sentence says the change was
committed. Ctrl-C while the program starts is answered by ``colonnade._startup``. Each
verb's module imports its application function when the verb runs, so ``--help`` and
``--version`` never load torch.
"""

from __future__ import annotations

import os
import signal
import sys
import warnings
from collections.abc import Sequence
from typing import Any

from ..errors import ColonnadeError, InterruptedAfterCommit
from .parser import build_parser

__all__ = ["main", "build_parser", "INTERRUPTED", "INTERRUPTED_AFTER_COMMIT"]

INTERRUPTED = "colonnade: interrupted; the workspace is unchanged"
INTERRUPTED_AFTER_COMMIT = ("colonnade: interrupted after the commit point; the change was "
                            "committed and the workspace is whole")


def _one_line_warning(message: Warning | str, category: type[Warning], filename: str,
                      lineno: int, file: Any = None, line: str | None = None) -> None:
    """A warning as one line, the way errors print, without the source line."""
    print(f"colonnade: warning: {message}", file=sys.stderr if file is None else file)


def _python_handles_ctrl_c() -> None:
    """Put Python's own SIGINT handler back where ``colonnade._startup`` set its own for
    the imports; any other handler (a caller's, or SIGINT ignored) is left as it is."""
    handler = signal.getsignal(signal.SIGINT)
    if getattr(handler, "__module__", None) == "colonnade._startup":
        signal.signal(signal.SIGINT, signal.default_int_handler)


def main(argv: Sequence[str] | None = None) -> int:
    try:
        _python_handles_ctrl_c()
        parser = build_parser()
        args = parser.parse_args(argv)
        with warnings.catch_warnings():
            warnings.showwarning = _one_line_warning
            if getattr(args, "wait", None) is None:
                return args.run(args)
            from ..app.transaction import lock_wait  # only verbs that write take --wait

            with lock_wait(args.wait):
                return args.run(args)
    except ColonnadeError as exc:
        print(f"colonnade: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except InterruptedAfterCommit:
        print(INTERRUPTED_AFTER_COMMIT, file=sys.stderr)
        return 130
    except KeyboardInterrupt:
        print(INTERRUPTED, file=sys.stderr)
        return 130
    except MemoryError:
        # Sizes are checked before anything is allocated (model.budget); this is for what
        # no check foresaw. Commits are atomic, so the workspace keeps a whole state.
        print("colonnade: error: this machine ran out of memory; the workspace keeps its "
              "last committed state", file=sys.stderr)
        return 1
    except BrokenPipeError:
        # The reader went away (``colonnade show --json | head``): stop quietly, as the
        # Python documentation on SIGPIPE advises, without a traceback at exit.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 1
    except OSError as exc:
        # The file system said no (a folder that cannot be made, a full disk): one sentence.
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"colonnade: error: {where}{exc.strerror or exc}; the workspace is unchanged",
              file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
