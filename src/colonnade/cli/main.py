"""The command line's entry point: parse, run one verb, print any refusal as one sentence.

No logic lives here. Every expected failure is a ColonnadeError, printed as one sentence
with a non-zero exit code; Ctrl-C exits 130 and, because workspaces are only written at
the end of an action, leaves them as they were. Each verb's module imports its
application function when the verb runs, so ``--help`` and ``--version`` never load torch.
"""

from __future__ import annotations

import os
import sys
import warnings
from collections.abc import Sequence
from typing import Any

from ..errors import ColonnadeError
from .parser import build_parser

__all__ = ["main", "build_parser"]


def _one_line_warning(message: Warning | str, category: type[Warning], filename: str,
                      lineno: int, file: Any = None, line: str | None = None) -> None:
    """A warning as one line, the way errors print, without the source line."""
    print(f"colonnade: warning: {message}", file=sys.stderr if file is None else file)


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        with warnings.catch_warnings():
            warnings.showwarning = _one_line_warning
            return args.run(args)
    except ColonnadeError as exc:
        print(f"colonnade: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("colonnade: interrupted; the workspace is unchanged", file=sys.stderr)
        return 130
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
