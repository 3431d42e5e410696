"""Reading the spec file: safe YAML that refuses duplicate keys, and line lookup.

:func:`read_yaml` returns the parsed data and the composed node tree, from
which :func:`line_of` finds the line of a key path for error messages.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml

from plateaufit.errors import SpecError

__all__ = ["read_yaml", "line_of"]


class _Loader(yaml.SafeLoader):
    """Safe YAML that refuses duplicate keys (a second ``tmin:`` would win silently)."""


def _construct_mapping(loader: _Loader, node: yaml.MappingNode, deep: bool = False):
    loader.flatten_mapping(node)
    seen: dict[Any, int] = {}
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=True)
        try:
            first = seen.get(key)
        except TypeError:
            raise yaml.constructor.ConstructorError(
                None, None, f"a key must be plain text, got {key!r}", key_node.start_mark
            ) from None
        if first is not None:
            raise yaml.constructor.ConstructorError(
                None, None, f"duplicate key {key!r} (first given at line {first}); give each "
                "key once", key_node.start_mark)
        seen[key] = key_node.start_mark.line + 1
    return yaml.SafeLoader.construct_mapping(loader, node, deep=deep)


_Loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def read_yaml(path: Path) -> tuple[Any, Any]:
    """The parsed YAML of ``path`` and its node tree.

    Raises
    ------
    SpecError
        At the file's path: not found, a directory, not UTF-8, unreadable,
        invalid YAML (with line and column) or a duplicate key.
    """
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SpecError(str(path), "spec file not found; check the path") from None
    except IsADirectoryError:
        raise SpecError(str(path), "is a directory; give the path of the YAML spec file") from None
    except UnicodeDecodeError:
        raise SpecError(str(path), "cannot decode the spec file as UTF-8 text") from None
    except OSError as exc:
        raise SpecError(str(path), f"cannot read the spec file ({exc.strerror or exc})") from None
    loader = _Loader(text)
    try:
        node = loader.get_single_node()
        data = loader.construct_document(node) if node is not None else None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        at = f"line {mark.line + 1}, column {mark.column + 1}" if mark else "unknown position"
        problem = exc.problem or exc.context or "invalid YAML"
        kind = ("YAML error" if isinstance(exc, yaml.constructor.ConstructorError)
                else "YAML syntax error")
        raise SpecError(str(path), f"{kind} at {at}: {problem}") from None
    except yaml.YAMLError as exc:
        raise SpecError(str(path), f"YAML error: {exc}") from None
    finally:
        loader.dispose()
    return data, node


def line_of(node: Any, loc: tuple) -> int | None:
    """Line (1-based) of the key path ``loc`` in the composed YAML, or of its deepest parent."""
    line = None
    for part in loc:
        if isinstance(node, yaml.MappingNode):
            for key_node, value_node in node.value:
                if isinstance(key_node, yaml.ScalarNode) and key_node.value == str(part):
                    line = key_node.start_mark.line + 1
                    node = value_node
                    break
            else:
                return line
        elif isinstance(node, yaml.SequenceNode) and isinstance(part, int):
            if not 0 <= part < len(node.value):
                return line
            node = node.value[part]
            line = node.start_mark.line + 1
        else:
            return line
    return line
