"""Reading YAML safely: safe loader, bounded expansion, one sentence per problem.

``yaml.safe_load`` keeps the last of two equal keys without a word, recurses once per
nesting level (a file nested thousands deep ends in a RecursionError), and follows
aliases: nine lines of anchors and aliases (a "billion laughs" file) stand for a billion
entries that anything walking the result (a digest, a JSON dump) then spells out. Here the
event stream is read first, which neither recurses nor expands: the nesting is measured,
and aliases are either refused outright (a manifest: colonnade never writes them) or
counted by the size of what they stand for against a budget (files people write by hand).
A duplicate key is refused naming the key and both lines, and every YAML error becomes one
sentence. Parsing uses libyaml's C parser when PyYAML has it (the same results, many times
faster on a large manifest), else PyYAML's own.
"""

from __future__ import annotations

from typing import Any

import yaml

from ..errors import ColonnadeError, SpecError

__all__ = ["MAX_DEPTH", "MAX_NODES", "load_yaml"]

# Far deeper than any spec, profile or manifest needs (a manifest nests about 8 deep).
MAX_DEPTH = 100
# What a hand-written file may stand for once its aliases are spelled out: a spec or a
# hardware profile has a few hundred values, so a million is far beyond any real one and
# still small enough to walk in a second. Our own bound; callers reading bigger files
# (manifests) pass their own.
MAX_NODES = 1_000_000

_SafeBase: type[yaml.SafeLoader] = getattr(yaml, "CSafeLoader", yaml.SafeLoader)


class _UniqueKeyLoader(_SafeBase):  # type: ignore[valid-type,misc]
    """The safe loader, refusing a mapping that repeats a key."""


def _construct_mapping(loader: _UniqueKeyLoader, node: yaml.MappingNode,
                       deep: bool = False) -> dict[Any, Any]:
    seen: dict[Any, int] = {}
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=True)
        try:
            first = seen.get(key)
        except TypeError:  # an unhashable key; the base constructor names it
            break
        line = key_node.start_mark.line + 1
        if first is not None:
            raise _Duplicate(key, first, line)
        seen[key] = line
    return yaml.SafeLoader.construct_mapping(loader, node, deep=deep)


_UniqueKeyLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG,
                                 _construct_mapping)


class _Duplicate(Exception):
    def __init__(self, key: Any, first: int, second: int) -> None:
        super().__init__(key, first, second)
        self.key, self.first, self.second = key, first, second


class _Refused(Exception):
    """The event scan found something the file may not hold; ``message`` says what."""

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message


_STARTS = (yaml.MappingStartEvent, yaml.SequenceStartEvent)
_ENDS = (yaml.MappingEndEvent, yaml.SequenceEndEvent)


def _too_deep(line: int) -> str:
    return (f"nested more than {MAX_DEPTH} levels deep (at line {line}); a file of this kind "
            f"needs only a few levels, so check its brackets and indentation")


def _scan(text: str, aliases: bool, max_nodes: int) -> None:
    """Walk the event stream once: nesting depth, and aliases refused or budgeted.

    ``total`` counts the values the document stands for with every alias spelled out: an
    alias adds the size its anchor had where it was defined, so nine levels of ten
    aliases count as a billion without anything being built.
    """
    depth = total = 0
    sizes: dict[str, int] = {}
    open_anchors: list[tuple[str | None, int]] = []
    for event in yaml.parse(text, Loader=_SafeBase):
        line = event.start_mark.line + 1
        anchor = getattr(event, "anchor", None)
        if anchor is not None and not aliases:
            kind = "alias" if isinstance(event, yaml.AliasEvent) else "anchor"
            raise _Refused(f"holds a YAML {kind} at line {line}, which colonnade never "
                           f"writes, so the file was "
                           f"edited by hand (an alias can stand for billions of values); "
                           f"restore it from a copy you trust")
        if isinstance(event, yaml.AliasEvent):
            total += sizes.get(anchor, 1)
        elif isinstance(event, yaml.ScalarEvent):
            total += 1
            if anchor is not None:
                sizes[anchor] = 1
        elif isinstance(event, _STARTS):
            total += 1
            depth += 1
            open_anchors.append((anchor, total - 1))
            if depth > MAX_DEPTH:
                raise _Refused(_too_deep(line))
        elif isinstance(event, _ENDS):
            depth -= 1
            opened, start = open_anchors.pop()
            if opened is not None:
                sizes[opened] = total - start
        if total > max_nodes:
            if sizes:
                raise _Refused(f"stands for more than {max_nodes:,} values once its YAML "
                               f"aliases are expanded (at line {line}); write the values out, "
                               f"or remove the aliases")
            raise _Refused(f"holds more than {max_nodes:,} values (at line {line}), more than "
                           f"a file of this kind ever needs; it was not written by colonnade, "
                           f"so restore it from a copy you trust")


def load_yaml(text: str, where: str, error: type[ColonnadeError] = SpecError,
              aliases: bool = True,
              invalid: str = "not valid YAML{at}; check indentation and brackets",
              max_nodes: int = MAX_NODES) -> Any:
    """Parse ``text`` (the file ``where``) or raise ``error`` with one sentence.

    ``aliases=False`` refuses any anchor or alias (files colonnade writes itself);
    otherwise what the aliases stand for is counted. Either way the file may stand for at
    most ``max_nodes`` values (scalars, mappings and sequences), counted before anything
    is built. ``invalid`` is the sentence for a file that is not valid YAML (``{at}``:
    where the parser stopped).
    """
    try:
        _scan(text, aliases, max_nodes)
        return yaml.load(text, Loader=_UniqueKeyLoader)  # noqa: S506 (a SafeLoader subclass)
    except _Refused as refused:
        raise error(f"{where}: {refused.message}") from None
    except _Duplicate as dup:
        raise error(f"{where}: key {dup.key!r} appears twice, at line {dup.first} and line "
                    f"{dup.second}; keep one of them") from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        if "nesting depth" in str(getattr(exc, "problem", "")):
            # libyaml stops at its own depth limit (1000) while reading ahead, before the
            # scan has seen the levels; the same sentence as ours.
            raise error(f"{where}: {_too_deep(mark.line + 1 if mark else 1)}") from None
        at = f" at line {mark.line + 1}" if mark is not None else ""
        raise error(f"{where}: {invalid.format(at=at)}") from None
