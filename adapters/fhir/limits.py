"""Limits on the shape of FHIR JSON, checked before anything recursive touches it.

A resource nested 600–1,000 levels deep passes a JSON parser (orjson stops at 1,024)
and then breaks whatever walks it recursively (pydantic, canonical JSON), which turns
one bad resource into a crash of the whole batch. ``too_deep`` measures nesting with
an explicit stack (no recursion, linear in the size, stops at the limit), so callers
can refuse such a resource with a reason before reading it:

- the subscription hook (``monitor/web/hooks.py``) does so for each delivered resource;
- ``gasgap ingest`` / replay: call ``too_deep(item)`` on each parsed NDJSON line or
  Bundle entry in ``monitor/ingest.py`` and turn a reason into a ``RejectedInput``;
- the poller: ``split_too_deep(resources)`` on each search page before
  ``builder.read_all``, quarantining what it refuses, so the watermark moves on.

``MAX_DEPTH`` counts objects and arrays from the resource itself (depth 1). Real
resources stay far below it: an Observation with components, codings and a nested
extension is under 10 levels (from memory of the R4 structure definitions; the limit
is common practice, no source).
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from typing import Any

import orjson

MAX_DEPTH = 100
#: How much of a refused resource is kept for review (its head, as JSON text).
REFUSED_HEAD_CHARS = 65_536


def nesting_depth(value: Any, stop_at: int | None = None) -> int:
    """How deep objects and arrays nest in ``value`` (a scalar: 0); stops counting once
    past ``stop_at`` (returns ``stop_at + 1``). No recursion, so any depth is safe."""
    deepest = 0
    stack: list[tuple[Any, int]] = [(value, 1)]
    while stack:
        node, depth = stack.pop()
        if isinstance(node, dict):
            children: Any = node.values()
        elif isinstance(node, list):
            children = node
        else:
            continue
        if depth > deepest:
            deepest = depth
            if stop_at is not None and deepest > stop_at:
                return deepest
        stack.extend((child, depth + 1) for child in children if isinstance(child, (dict, list)))
    return deepest


def label(resource: Any) -> str:
    """``Observation/abc`` for a resource, as far as it can be told."""
    if not isinstance(resource, dict):
        return "resource"
    rtype = resource.get("resourceType")
    rid = resource.get("id")
    kind = rtype if isinstance(rtype, str) else "resource"
    return f"{kind}/{rid if isinstance(rid, str) else '?'}"


def too_deep(resource: Any, limit: int = MAX_DEPTH) -> str | None:
    """The reason to refuse ``resource`` for its nesting, or None when it is within
    ``limit``."""
    if _few_brackets(resource, limit):
        return None
    depth = nesting_depth(resource, stop_at=limit)
    if depth <= limit:
        return None
    return (
        f"{label(resource)} nests objects and arrays more than {limit} levels deep: refused unread"
    )


def _few_brackets(value: Any, limit: int) -> bool:
    """True when ``value`` written as JSON has at most ``limit`` opening brackets, so it
    cannot nest deeper than ``limit`` (each level of nesting opens one). Written by
    orjson (C, itself refusing over 255 levels), far cheaper than walking the value in
    Python; anything it cannot write is left to the walk."""
    try:
        text = orjson.dumps(value)
    except (orjson.JSONEncodeError, TypeError, ValueError, RecursionError):
        return False
    return text.count(b"{") + text.count(b"[") <= limit


def bounded_head(value: Any, limit: int = REFUSED_HEAD_CHARS) -> str:
    """JSON text of ``value`` cut at ``limit`` characters, written without recursion
    (for keeping a refused resource that a JSON library may refuse to write)."""
    out: list[str] = []
    size = 0
    stack: list[tuple[bool, Any]] = [(False, value)]  # (is literal text, item)
    while stack and size < limit:
        literal, node = stack.pop()
        if literal:
            piece = node
        elif isinstance(node, dict):
            piece = "{"
            stack.append((True, "}"))
            items = list(node.items())
            for i in range(len(items) - 1, -1, -1):
                key, child = items[i]
                stack.append((False, child))
                stack.append((True, _scalar(str(key)) + ": "))
                if i > 0:
                    stack.append((True, ", "))
        elif isinstance(node, list):
            piece = "["
            stack.append((True, "]"))
            for i in range(len(node) - 1, -1, -1):
                stack.append((False, node[i]))
                if i > 0:
                    stack.append((True, ", "))
        else:
            piece = _scalar(node)
        out.append(piece)
        size += len(piece)
    return "".join(out)[:limit]


def _scalar(value: Any) -> str:
    if isinstance(value, str):
        return json.dumps(value)
    if value is None:
        return "null"
    if value is True:
        return "true"
    if value is False:
        return "false"
    return str(value)


def split_too_deep(
    resources: Sequence[Any], limit: int = MAX_DEPTH
) -> tuple[list[int], list[tuple[int, str, str]]]:
    """Indexes of the resources within ``limit``, and ``(index, reason, head)`` for
    each one refused (``head``: its first ``REFUSED_HEAD_CHARS`` as text, to keep)."""
    kept: list[int] = []
    refused: list[tuple[int, str, str]] = []
    for index, resource in enumerate(resources):
        reason = too_deep(resource, limit)
        if reason is None:
            kept.append(index)
        else:
            refused.append((index, reason, bounded_head(resource)))
    return kept, refused
