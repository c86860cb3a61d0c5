"""Reading YAML files that people write by hand: safe loader, one sentence per problem.

``yaml.safe_load`` keeps the last of two equal keys without a word, and recurses once
per nesting level, so a file nested thousands deep ends in a RecursionError. Here the
nesting is measured first on the event stream (which does not recurse), a duplicate key
is refused naming the key and both lines, and every YAML error becomes one sentence.
"""

from __future__ import annotations

from typing import Any

import yaml

from ..errors import ColonnadeError, SpecError

__all__ = ["MAX_DEPTH", "load_yaml"]

# Far deeper than any spec, profile or manifest needs (a manifest nests about 8 deep).
MAX_DEPTH = 100


class _UniqueKeyLoader(yaml.SafeLoader):
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


def _depth(text: str) -> tuple[int, int]:
    """The deepest nesting of mappings and sequences, and the line where it is reached."""
    depth = deepest = line = 0
    for event in yaml.parse(text, Loader=yaml.SafeLoader):
        if isinstance(event, (yaml.MappingStartEvent, yaml.SequenceStartEvent)):
            depth += 1
            if depth > deepest:
                deepest, line = depth, event.start_mark.line + 1
            if depth > MAX_DEPTH:
                break
        elif isinstance(event, (yaml.MappingEndEvent, yaml.SequenceEndEvent)):
            depth -= 1
    return deepest, line


def load_yaml(text: str, where: str, error: type[ColonnadeError] = SpecError) -> Any:
    """Parse ``text`` (the file ``where``) or raise ``error`` with one sentence."""
    try:
        deepest, line = _depth(text)
        if deepest > MAX_DEPTH:
            raise error(f"{where}: nested more than {MAX_DEPTH} levels deep (at line {line}); "
                        f"a file of this kind needs only a few levels, so check its brackets "
                        f"and indentation")
        return yaml.load(text, Loader=_UniqueKeyLoader)  # noqa: S506 (a SafeLoader subclass)
    except _Duplicate as dup:
        raise error(f"{where}: key {dup.key!r} appears twice, at line {dup.first} and line "
                    f"{dup.second}; keep one of them") from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        at = f" at line {mark.line + 1}" if mark is not None else ""
        raise error(f"{where}: not valid YAML{at}; check indentation and brackets") from None
