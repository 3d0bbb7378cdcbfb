"""Shared helpers for the plan and bench fuzz tests: random mutations of a parsed TOML tree."""

from __future__ import annotations

import copy
from typing import Any

from hypothesis import strategies as st


def key_paths(tree: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    """Every key path (dict keys and list indices) in a parsed TOML tree."""
    found: list[tuple[Any, ...]] = []
    if isinstance(tree, dict):
        items: Any = tree.items()
    elif isinstance(tree, list):
        items = enumerate(tree)
    else:
        items = []
    for key, value in items:
        found.append((*prefix, key))
        found.extend(key_paths(value, (*prefix, key)))
    return found


def mutate(draw: st.DrawFn, data: dict[str, Any], trees: st.SearchStrategy[Any]) -> dict[str, Any]:
    """One to three random deletions, replacements (by a drawn tree) or key misspellings."""
    for _ in range(draw(st.integers(min_value=1, max_value=3))):
        paths = key_paths(data)
        if not paths:
            break
        path = draw(st.sampled_from(paths))
        parent = data
        for key in path[:-1]:
            parent = parent[key]
        action = draw(st.sampled_from(["delete", "replace", "rename"]))
        if action == "delete":
            del parent[path[-1]]
        elif action == "replace":
            parent[path[-1]] = copy.deepcopy(draw(trees))
        elif isinstance(parent, dict):
            parent[path[-1] + draw(st.sampled_from(["s", "_", "x"]))] = parent.pop(path[-1])
    return data
