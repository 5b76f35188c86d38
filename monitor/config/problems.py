"""Turning pydantic's validation errors into one line a problem: the key path as the
file spells it and what was wrong, e.g. ``rules[2].threshold: must be > 0, got -5``."""

from collections.abc import Mapping

from pydantic_core import ErrorDetails


def _key_path(loc: tuple[int | str, ...], raw: object) -> str:
    """``("rules", 2, "sf_low", "threshold")`` -> ``rules[2].threshold``: the union's
    tag (the entry's ``type``) is not a key of the file, so it is left out."""
    text = ""
    node: object = raw
    for item in loc:
        if isinstance(item, int):
            text += f"[{item}]"
            node = node[item] if isinstance(node, list) and 0 <= item < len(node) else None
            continue
        if isinstance(node, Mapping) and item not in node and node.get("type") == item:
            continue
        text += f".{item}" if text else str(item)
        node = node.get(item) if isinstance(node, Mapping) else None
    return text


def _shown(value: object) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _bound(value: object) -> str:
    return f"{value:g}" if isinstance(value, int | float) else str(value)


def _problem(error: ErrorDetails) -> str:
    kind = error["type"]
    ctx = error.get("ctx") or {}
    got = _shown(error.get("input"))
    match kind:
        case "greater_than":
            return f"must be > {_bound(ctx['gt'])}, got {got}"
        case "greater_than_equal":
            return f"must be >= {_bound(ctx['ge'])}, got {got}"
        case "less_than":
            return f"must be < {_bound(ctx['lt'])}, got {got}"
        case "less_than_equal":
            return f"must be <= {_bound(ctx['le'])}, got {got}"
        case "missing":
            return "is required"
        case "extra_forbidden":
            return "unknown key"
        case "literal_error":
            return f"must be {ctx['expected']}, got {got}"
        case "union_tag_invalid":
            return f"unknown type {ctx['tag']!r}; known types: {ctx['expected_tags']}"
        case "union_tag_not_found":
            return f"needs a {ctx['discriminator']}"
        case "string_pattern_mismatch":
            return f"must match {ctx['pattern']}, got {got}"
        case "value_error":
            return str(error["msg"]).removeprefix("Value error, ")
    return f"{error['msg']}, got {got}"
