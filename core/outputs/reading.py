"""Small helpers for the validators of the result files the tool reads back (sweep,
comparison, workspace): each reader checks its files in one place and says, in one
sentence, which file is damaged and how."""

from __future__ import annotations

from typing import Any


class Damaged(Exception):
    """Raised inside a reader's validator; the reader finishes it into one sentence naming the file."""


def json_kind(value: Any) -> str:
    """How a JSON value reads in a sentence: "an object", "a list", "a number", ..."""
    if isinstance(value, bool):
        return "true/false"
    if isinstance(value, dict):
        return "an object"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, (int, float)):
        return "a number"
    return "null" if value is None else type(value).__name__


_WANTED = {dict: "an object", list: "a list", str: "a string", int: "a whole number", float: "a number", (int, float): "a number"}


def need(container: Any, key: str, kind: type | tuple[type, ...], parent: str = "") -> Any:
    """container[key], which must be of `kind` (JSON numbers: never true/false); else Damaged,
    naming the entry by its path in the file ("settings.sigmas")."""
    entry = f'"{parent}.{key}"' if parent else f'"{key}"'
    if not isinstance(container, dict) or key not in container:
        raise Damaged(f"its {entry} entry is missing")
    value = container[key]
    numeric = kind in (int, float, (int, float))
    if not isinstance(value, kind) or (numeric and isinstance(value, bool)):
        raise Damaged(f"its {entry} entry is {json_kind(value)}, not {_WANTED.get(kind, 'of the right kind')}")
    return value
