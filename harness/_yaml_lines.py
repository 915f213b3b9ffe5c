"""Line numbers of keys in a YAML document, for error messages.

The document is composed (not constructed) with PyYAML's SafeLoader, so no
Python object is ever built from it.
"""

from __future__ import annotations

from typing import Any, Sequence

import yaml


def node_lines(text: str) -> yaml.Node | None:
    """The composed node tree of the first document, or None for an empty one."""
    return yaml.compose(text, Loader=yaml.SafeLoader)


def line_of(root: yaml.Node | None, path: Sequence[Any]) -> int | None:
    """1-based line of the deepest node that ``path`` reaches (mapping keys and list indices)."""
    node, line = root, None
    if node is not None:
        line = node.start_mark.line + 1
    for step in path:
        if isinstance(node, yaml.MappingNode):
            match = next((pair for pair in node.value if pair[0].value == step), None)
            if match is None:
                return line
            key_node, node = match
            line = key_node.start_mark.line + 1
        elif isinstance(node, yaml.SequenceNode) and isinstance(step, int) and 0 <= step < len(node.value):
            node = node.value[step]
            line = node.start_mark.line + 1
        else:
            return line
    return line
