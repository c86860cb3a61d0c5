"""One exception hierarchy, so the CLI can turn any expected failure into one sentence.

Every message is a single sentence that says what is wrong and how to fix it.
"""

__all__ = [
    "ColonnadeError",
    "SpecError",
    "DataError",
    "WorkspaceError",
    "SealedError",
    "UsageError",
    "BusyError",
    "InterruptedAfterCommit",
]


class ColonnadeError(Exception):
    """Base of every error colonnade expects; the CLI prints it and exits non-zero."""

    exit_code = 2


class SpecError(ColonnadeError):
    """A spec or hardware profile is malformed; the message names the field path."""


class DataError(ColonnadeError):
    """Task data cannot be used: wrong shape, labels, values, or an unreadable file."""


class WorkspaceError(ColonnadeError):
    """A workspace is missing, inconsistent, or asked for something it does not hold."""


class SealedError(ColonnadeError):
    """An action would write into a sealed task's closure."""


class UsageError(ColonnadeError):
    """Flags or arguments that do not fit together."""


class BusyError(ColonnadeError):
    """Another process holds the workspace's writer lock; the message names it.

    Its own exit code (3) lets scripts tell "try again later" from a refusal.
    """

    exit_code = 3


class InterruptedAfterCommit(KeyboardInterrupt):
    """Ctrl-C arrived while a commit was being made and the commit was finished anyway.

    A KeyboardInterrupt, so anything that stops on Ctrl-C still stops; the CLI tells the
    user that the change was committed instead of saying the workspace is unchanged.
    """
