"""The argument parser: one sub-command a verb, assembled from the verb groups' modules."""

from __future__ import annotations

import argparse
from collections.abc import Callable
from typing import NoReturn

from .._version import __version__
from .adopt_cmds import add_parsers as add_adopt_verbs
from .cost_cmds import add_parsers as add_cost_verbs
from .diff_cmds import add_parsers as add_diff_verbs
from .evidence_cmds import add_parsers as add_evidence_verbs
from .export_cmds import add_parsers as add_export_verbs
from .key_cmds import add_parsers as add_key_verbs
from .lifecycle_cmds import add_parsers as add_lifecycle_verbs
from .record_cmds import add_parsers as add_record_verbs
from .trim_cmds import add_parsers as add_trim_verbs
from .workspace_cmds import add_parsers as add_workspace_verbs

__all__ = ["build_parser", "Parser", "short_usage"]

# The verb groups, in the order of ``colonnade --help``.
GROUPS = (add_workspace_verbs, add_adopt_verbs, add_evidence_verbs, add_export_verbs,
          add_cost_verbs, add_trim_verbs, add_diff_verbs, add_lifecycle_verbs,
          add_key_verbs, add_record_verbs)


class Parser(argparse.ArgumentParser):
    """argparse, but a mistake prints one sentence and the verb's short usage line
    instead of the whole usage block."""

    def error(self, message: str) -> NoReturn:
        self.exit(2, f"{self.prog}: error: {message}\n{short_usage(self)}\n")


def short_usage(parser: argparse.ArgumentParser) -> str:
    """``usage: PROG POSITIONALS REQUIRED-OPTIONS [options]``, and where the rest is."""
    words = [parser.prog]
    optional = False
    for action in parser._actions:  # argparse keeps no public list of its actions
        if isinstance(action, argparse._HelpAction):
            continue
        if not action.option_strings:
            words.append(action.metavar or action.dest.upper())
            if isinstance(action, argparse._SubParsersAction):
                words.append("...")
        elif action.required:
            words.append(f"{action.option_strings[-1]} {action.metavar or action.dest.upper()}")
        else:
            optional = True
    if optional:
        words.append("[options]")
    return f"usage: {' '.join(words)} (see '{parser.prog} --help')"


def build_parser() -> argparse.ArgumentParser:
    parser = Parser(
        prog="colonnade",
        description="Grow a progressive network one column per task; earlier tasks stay "
                    "bit-identical.")
    parser.add_argument("--version", action="version", version=f"colonnade {__version__}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    sub.required = True

    def verb(name: str, run: Callable[[argparse.Namespace], int], help: str,
             ) -> argparse.ArgumentParser:
        p = sub.add_parser(name, help=help, description=help)
        p.set_defaults(run=run)
        return p
    for add_verbs in GROUPS:
        add_verbs(verb)
    return parser
