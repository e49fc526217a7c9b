"""Load a YAML document safely, with the line of every key, for messages that point at the text.

PyYAML's SafeLoader never constructs objects. Two things are added: floats as YAML 1.2 writes
them (`70e6` is a number to the people who type plans, a string to YAML 1.1), and a map from key
path to line number, built from the composed node tree under a budget, so an alias bomb is
refused instead of expanded.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import yaml

from nightbench.drivers.errors import InputError

MAX_BYTES = 1 << 20
MAX_NODES = 200_000

KeyPath = tuple[Any, ...]


class _PlanLoader(yaml.SafeLoader):
    """SafeLoader that also reads YAML 1.2 floats such as 70e6, 1.2e9 and 3e+08."""


_PlanLoader.add_implicit_resolver(
    "tag:yaml.org,2002:float",
    re.compile(r"^[-+]?(?:\d+\.?\d*|\.\d+)[eE][-+]?\d+$"),
    list("-+0123456789."),
)


def _line_map(root: yaml.Node, file: str) -> dict[KeyPath, int]:
    lines: dict[KeyPath, int] = {}
    budget = [MAX_NODES]
    stack: list[tuple[yaml.Node, KeyPath]] = [(root, ())]
    while stack:
        node, path = stack.pop()
        budget[0] -= 1
        if budget[0] < 0:
            raise InputError(
                f"the document expands to more than {MAX_NODES} values (too many aliases?); refused", file=file
            )
        lines.setdefault(path, node.start_mark.line + 1)
        if isinstance(node, yaml.MappingNode):
            seen: set[Any] = set()
            for key_node, value_node in node.value:
                key = key_node.value
                if not isinstance(key, str):
                    raise InputError(
                        "a key must be a plain name, not a list or mapping",
                        file=file,
                        line=key_node.start_mark.line + 1,
                    )
                if key in seen:  # YAML loaders keep the last silently: a typo'd copy would win
                    raise InputError(
                        f"key '{key}' appears twice in the same mapping",
                        file=file,
                        line=key_node.start_mark.line + 1,
                        key=".".join(map(str, path + (key,))),
                    )
                seen.add(key)
                lines.setdefault(path + (key,), key_node.start_mark.line + 1)
                stack.append((value_node, path + (key,)))
        elif isinstance(node, yaml.SequenceNode):
            for i, item in enumerate(node.value):
                stack.append((item, path + (i,)))
    return lines


def load_yaml_text(text: str, file: str) -> tuple[Any, dict[KeyPath, int]]:
    """Parse YAML text into plain data and a key-path -> line map; InputError on any problem."""
    if not text.strip():
        raise InputError("the file is empty", file=file)
    try:
        loader = _PlanLoader(text)
        try:
            node = loader.get_single_node()
            if node is None:
                raise InputError("the file holds no YAML document", file=file)
            lines = _line_map(node, file)
            data = loader.construct_document(node)
        finally:
            loader.dispose()
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark else None
        problem = exc.problem or exc.context or "not valid YAML"
        raise InputError(f"not valid YAML: {problem}", file=file, line=line) from exc
    except yaml.YAMLError as exc:
        raise InputError(f"not valid YAML: {exc}", file=file) from exc
    except RecursionError as exc:
        raise InputError("the document is nested too deeply", file=file) from exc
    return data, lines


def read_text(path: Path, *, what: str = "a YAML plan", max_bytes: int = MAX_BYTES) -> str:
    """Read a plan-like text file: missing, huge or binary files are refused plainly."""
    file = str(path)
    try:
        if path.is_dir():
            raise InputError(f"is a directory, not {what}", file=file)
        size = path.stat().st_size
    except FileNotFoundError as exc:
        raise InputError("no such file", file=file) from exc
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror}", file=file) from exc
    if size > max_bytes:
        raise InputError(f"the file is {size} bytes; files larger than {max_bytes} bytes are refused", file=file)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror}", file=file) from exc
    if b"\x00" in raw:
        raise InputError(f"is a binary file, not {what}", file=file)
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InputError(f"is not UTF-8 text (byte {exc.start})", file=file) from exc
