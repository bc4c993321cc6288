"""Reading a workflow's text safely, and showing user values in messages without echoing them whole.

A workflow file is a few hundred bytes; :data:`MAX_WORKFLOW_BYTES` refuses data files given
by mistake, and :func:`safe_load` refuses YAML whose aliases (``&a`` / ``*a``) expand to
more than :data:`MAX_WORKFLOW_NODES` values (a 600-byte "alias bomb" expands to 10^9).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import yaml

from snaplift.errors import ConfigError

__all__ = ["MAX_MESSAGE", "MAX_SHOWN", "MAX_WORKFLOW_BYTES", "MAX_WORKFLOW_NODES", "safe_load", "shorten", "shown"]

#: largest workflow file read (a workflow is a few hundred bytes; this refuses data files given by mistake)
MAX_WORKFLOW_BYTES = 2**20
#: largest number of YAML nodes a workflow may expand to through aliases (``&a`` / ``*a``)
MAX_WORKFLOW_NODES = 10_000
#: longest value quoted in an error message, and longest message (characters)
MAX_SHOWN = 200
MAX_MESSAGE = 1500


def _expanded_nodes(node: yaml.Node, memo: dict[int, int], active: set[int]) -> int:
    """Nodes of the document with every alias expanded (shared nodes counted each time used)."""
    key = id(node)
    if key in memo:
        return memo[key]
    if key in active:  # a recursive alias: infinite expansion
        return MAX_WORKFLOW_NODES + 1
    active.add(key)
    total = 1
    if isinstance(node, yaml.SequenceNode):
        for child in node.value:
            total += _expanded_nodes(child, memo, active)
            if total > MAX_WORKFLOW_NODES:
                break
    elif isinstance(node, yaml.MappingNode):
        for name, value in node.value:
            total += _expanded_nodes(name, memo, active) + _expanded_nodes(value, memo, active)
            if total > MAX_WORKFLOW_NODES:
                break
    active.discard(key)
    memo[key] = total
    return total


def safe_load(text: str, path: Path) -> Any:
    """``yaml.safe_load`` that refuses documents whose aliases expand beyond :data:`MAX_WORKFLOW_NODES` nodes."""
    loader = yaml.SafeLoader(text)
    try:
        node = loader.get_single_node()
        if node is None:
            return None
        if _expanded_nodes(node, {}, set()) > MAX_WORKFLOW_NODES:
            raise ConfigError(f"workflow {path} expands to more than {MAX_WORKFLOW_NODES} values through YAML "
                              "aliases (*name); write the values out or use fewer aliases")
        return loader.construct_document(node)
    finally:
        loader.dispose()


def shorten(text: str, limit: int = MAX_SHOWN) -> str:
    """``text`` on one line, cut to ``limit`` characters with a note of how much was left out.

    Example
    -------
    >>> shorten("a" * 300, 10)
    'aaaaaaaaaa... (290 more characters)'
    """
    text = " ".join(str(text).split())
    return text if len(text) <= limit else f"{text[:limit]}... ({len(text) - limit} more characters)"


def shown(given: Any) -> str:
    """A short rendering of a value given by the user (never the whole of a large value)."""
    if isinstance(given, dict):
        return "{...}"
    if isinstance(given, (list, tuple)) and len(given) > 20:
        return f"[a list of {len(given)} values]"
    if isinstance(given, str) and len(given) > MAX_SHOWN:
        return json.dumps(given[:MAX_SHOWN]) + f"... ({len(given) - MAX_SHOWN} more characters)"
    try:
        return shorten(json.dumps(given, default=str))
    except (TypeError, ValueError, RecursionError):
        return shorten(repr(given))
