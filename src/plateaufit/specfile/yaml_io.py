"""Reading the spec file: safe YAML that refuses duplicate keys, and line lookup.

:func:`read_yaml` returns the parsed data and the composed node tree, from
which :func:`line_of` finds the line of a key path for error messages.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path
from typing import Any

import yaml

from plateaufit.data.files import FileContext, open_regular
from plateaufit.errors import DataError, SpecError

__all__ = ["read_yaml", "line_of", "MAX_SPEC_BYTES", "MAX_SPEC_VALUES", "MAX_FLOW_DEPTH"]


#: largest spec file read (bytes): a spec is a few kB; anything near this is the wrong file
MAX_SPEC_BYTES = 1024**2
#: deepest nesting of flow collections (``[`` and ``{``) read; a spec nests a few levels
MAX_FLOW_DEPTH = 200
#: most values a spec may expand to through YAML anchors and aliases (a spec has hundreds)
MAX_SPEC_VALUES = 200_000

_MERGE_TAG = "tag:yaml.org,2002:merge"


class _Loader(yaml.SafeLoader):
    """Safe YAML that refuses duplicate keys (a second ``tmin:`` would win silently).

    YAML 1.1 merge keys work as written: ``<<: *base`` copies the keys of
    ``base``, and a key given beside it overrides the copied one. Only a key
    written twice in the same mapping is a duplicate.
    """


def _construct_mapping(loader: _Loader, node: yaml.MappingNode, deep: bool = False):
    seen: dict[Any, int] = {}
    for key_node, _ in node.value:
        if key_node.tag == _MERGE_TAG:
            continue
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
    loader.flatten_mapping(node)   # merged keys first, so the mapping's own keys override them
    return yaml.SafeLoader.construct_mapping(loader, node, deep=deep)


_Loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def _expanded_size(root: Any, path: Path) -> int:
    """Values the node tree stands for with every alias expanded; SpecError past the limit
    or for an alias inside its own anchor (a spec that refers to itself)."""
    sizes: dict[int, int] = {}
    open_nodes: set[int] = set()
    stack: list[tuple[Any, bool]] = [(root, False)]
    while stack:
        node, done = stack.pop()
        key = id(node)
        if done:
            open_nodes.discard(key)
            children = _children(node)
            sizes[key] = 1 + sum(sizes[id(c)] for c in children)
            if sizes[key] > MAX_SPEC_VALUES:
                raise SpecError(str(path), f"the spec expands to more than {MAX_SPEC_VALUES} "
                                "values through YAML anchors and aliases; a spec needs far "
                                "fewer -- write the repeated parts out or use fewer aliases")
            continue
        if key in sizes:
            continue
        if key in open_nodes:
            mark = node.start_mark
            raise SpecError(str(path), f"YAML error at line {mark.line + 1}, column "
                            f"{mark.column + 1}: an alias refers to the anchor it is inside "
                            "(a value that contains itself); remove the alias")
        open_nodes.add(key)
        stack.append((node, True))
        for child in _children(node):
            if id(child) in open_nodes:
                mark = child.start_mark
                raise SpecError(str(path), f"YAML error at line {mark.line + 1}, column "
                                f"{mark.column + 1}: an alias refers to the anchor it is inside "
                                "(a value that contains itself); remove the alias")
            stack.append((child, False))
    return sizes.get(id(root), 0)


def _children(node: Any) -> list[Any]:
    if isinstance(node, yaml.MappingNode):
        return [n for pair in node.value for n in pair]
    if isinstance(node, yaml.SequenceNode):
        return list(node.value)
    return []


def _read_spec_text(path: Path) -> str:
    """The spec file's text: a regular file only (a pipe or device is refused unopened, and
    the open never blocks), at most MAX_SPEC_BYTES, UTF-8."""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise SpecError(str(path), "spec file not found; check the path") from None
    except OSError as exc:
        raise SpecError(str(path), f"cannot read the spec file ({exc.strerror or exc})") from None
    if stat.S_ISDIR(st.st_mode):
        raise SpecError(str(path), "is a directory; give the path of the YAML spec file")
    if not stat.S_ISREG(st.st_mode):
        raise SpecError(str(path), "is not a regular file (a pipe, device or socket, which "
                        "could block or never end); give the YAML spec file itself")
    if st.st_size > MAX_SPEC_BYTES:
        raise SpecError(str(path), f"is {st.st_size} bytes, far larger than a spec file "
                        f"(limit {MAX_SPEC_BYTES}); check that it is the right file")
    try:
        with open_regular(path, FileContext(path)) as handle:
            data = handle.read(MAX_SPEC_BYTES + 1)
    except DataError as err:
        raise SpecError(str(path), err.message.removeprefix(f"{path}: ")) from None
    except OSError as exc:
        raise SpecError(str(path), f"cannot read the spec file ({exc.strerror or exc})") from None
    if len(data) > MAX_SPEC_BYTES:
        raise SpecError(str(path), f"is larger than a spec file (limit {MAX_SPEC_BYTES} bytes); "
                        "check that it is the right file")
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[:exc.start].count(b"\n") + 1
        raise SpecError(str(path), f"cannot decode the spec file as UTF-8 text (byte "
                        f"{exc.start}, line {line}); save it as UTF-8") from None


def _check_flow_depth(text: str, path: Path) -> None:
    """Refuse ``[[[[...`` nested past MAX_FLOW_DEPTH before the (slow) YAML scanner sees it.

    Counts brackets outside quotes and comments, an upper bound of the nesting."""
    depth = 0
    quote = ""
    for line_no, line in enumerate(text.splitlines(), 1):
        for ch in line:
            if quote:
                if ch == quote:
                    quote = ""
            elif ch in "\"'":
                quote = ch
            elif ch == "#":
                break
            elif ch in "[{":
                depth += 1
                if depth > MAX_FLOW_DEPTH:
                    raise SpecError(str(path), f"YAML error at line {line_no}: brackets nested "
                                    f"more than {MAX_FLOW_DEPTH} deep, which no spec needs; "
                                    "check the file")
            elif ch in "]}":
                depth = max(depth - 1, 0)


def read_yaml(path: Path) -> tuple[Any, Any]:
    """The parsed YAML of ``path`` and its node tree.

    Raises
    ------
    SpecError
        At the file's path: not found, a directory or not a regular file, too
        large, not UTF-8, unreadable, invalid YAML (with line and column), a
        duplicate key, nesting too deep, or aliases that expand too far.
    """
    text = _read_spec_text(path)
    if "\x00" in text:
        raise SpecError(str(path), "contains NUL bytes, so it is not a text spec file; give "
                        "the YAML spec file")
    _check_flow_depth(text, path)
    loader = _Loader(text)
    try:
        node = loader.get_single_node()
        if node is not None:
            _expanded_size(node, path)
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
    except RecursionError:
        raise SpecError(str(path), "the YAML is nested too deeply to be a spec; check the "
                        "file") from None
    finally:
        loader.dispose()
    return data, node


def line_of(node: Any, loc: tuple) -> int | None:
    """Line (1-based) of the key path ``loc`` in the composed YAML, or of its deepest parent."""
    line = None
    for part in loc:
        if isinstance(node, yaml.MappingNode):
            # the last match: a key beside a merge (``<<: *base``) overrides the merged one
            matches = [(k, v) for k, v in node.value
                       if isinstance(k, yaml.ScalarNode) and k.value == str(part)]
            if not matches:
                return line
            key_node, node = matches[-1]
            line = key_node.start_mark.line + 1
        elif isinstance(node, yaml.SequenceNode) and isinstance(part, int):
            if not 0 <= part < len(node.value):
                return line
            node = node.value[part]
            line = node.start_mark.line + 1
        else:
            return line
    return line
