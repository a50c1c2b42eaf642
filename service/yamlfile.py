"""Strict YAML reading shared by policy, routes and keys files.

PyYAML's safe loader silently keeps the last of two equal keys in a mapping. In a reviewed
configuration file that is a trap (the reviewer reads one value, the service uses another), so
this loader refuses duplicate keys and reports the line.
"""

from __future__ import annotations

from typing import Any

import yaml


class YamlFileError(ValueError):
    """A file that is not well-formed YAML, with the position when PyYAML knows it."""


class _StrictLoader(yaml.SafeLoader):
    pass


def _construct_mapping(loader: _StrictLoader, node: yaml.MappingNode) -> dict[Any, Any]:
    loader.flatten_mapping(node)
    seen: set[Any] = set()
    for key_node, _ in node.value:
        key = loader.construct_object(key_node)
        try:
            duplicate = key in seen
        except TypeError:  # an unhashable key; construct_mapping reports it properly below
            break
        if duplicate:
            raise yaml.constructor.ConstructorError(
                None, None, f"duplicate key {key!r}", key_node.start_mark
            )
        seen.add(key)
    return loader.construct_mapping(node)


_StrictLoader.add_constructor(
    yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG,
    _construct_mapping,
)


def parse_yaml(text: str | bytes) -> Any:
    """Parse one YAML document; raise YamlFileError (with line and column) on any problem."""
    try:
        return yaml.load(text, Loader=_StrictLoader)  # a SafeLoader subclass: no arbitrary objects
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark
        where = f"line {mark.line + 1}, column {mark.column + 1}: " if mark is not None else ""
        raise YamlFileError(f"not valid YAML: {where}{exc.problem}") from None
    except yaml.YAMLError as exc:
        raise YamlFileError(f"not valid YAML: {exc}") from None
