"""
The one strict JSON reader for bodies that come from outside (docs/wire-protocol.md §9.1).

`json.loads` alone accepts what the rest of the program cannot handle: ``NaN`` and ``Infinity`` (and
``1e999``, which becomes infinity), nesting deep enough to exhaust the recursion limit, strings with
lone surrogates (cannot be encoded as UTF-8, so no database or log takes them) and NUL characters
(PostgreSQL text refuses them). `loads` refuses all of these with a `JsonError` naming the problem.

The checks cost little on the hot path (a batch body is mostly flat lists of integers): numbers are
checked as they are parsed, the depth walk visits containers only, and strings are walked only when
the raw text holds a ``\\u0000`` or a ``\\uD800``-``\\uDFFF`` escape.
"""

from __future__ import annotations

import json
import math
import re
from typing import Any

from listenpost.core.errors import DecodeError

MAX_DEPTH = 16
"""Deepest nesting of arrays and objects accepted (a batch needs 4, a heartbeat about 5)."""

# Only an escape can put a surrogate or a NUL into a decoded string: raw surrogate bytes are not
# UTF-8 (refused at decode) and a raw control character is refused by the JSON parser itself.
_SUSPECT_ESCAPE = re.compile(r"\\u(?:0000|[dD][89a-fA-F])")


class JsonError(DecodeError):
    """A body that is not strict JSON; the message says what is wrong and, where known, where."""


def _constant(name: str) -> Any:
    raise JsonError(f"{name} is not allowed (numbers must be finite)")


def _float(text: str) -> float:
    v = float(text)
    if not math.isfinite(v):
        raise JsonError(f"number {text[:40]} is not finite")
    return v


_DECODER = json.JSONDecoder(parse_constant=_constant, parse_float=_float)


def _check(obj: Any, max_depth: int, strings: bool) -> None:
    """Walk containers (and, with ``strings``, every string) without recursion; raise on the first fault."""
    if not isinstance(obj, dict | list):
        if strings and isinstance(obj, str):
            _check_string(obj, "the top")
        return
    stack: list[tuple[Any, str, int]] = [(obj, "", 1)]
    while stack:
        node, path, depth = stack.pop()
        if depth > max_depth:
            raise JsonError(f"nested more than {max_depth} levels deep at {path or 'the top'}")
        if isinstance(node, dict):
            items: Any = node.items()
        else:
            # The common case, a flat list of numbers, is decided by one pass in C.
            if not strings and not (set(map(type, node)) & {list, dict}):
                continue
            items = enumerate(node)
        for k, v in items:
            sub = f"{path}.{k}" if isinstance(k, str) else f"{path}[{k}]"
            sub = sub.lstrip(".")
            if strings:
                for s, where in ((k, f"a key in {path or 'the top'}"), (v, sub)):
                    if isinstance(s, str):
                        _check_string(s, where)
            if isinstance(v, dict | list):
                stack.append((v, sub, depth + 1))


def _check_string(s: str, where: str) -> None:
    if "\x00" in s:
        raise JsonError(f"{where}: a string holds a NUL character")
    try:
        s.encode("utf-8")
    except UnicodeEncodeError:
        raise JsonError(f"{where}: a string holds a lone surrogate (\\uD800-\\uDFFF)") from None


def loads(data: bytes | str, *, max_depth: int = MAX_DEPTH) -> Any:
    """
    Parse strict JSON: UTF-8, finite numbers, at most ``max_depth`` levels, no NUL or lone surrogate.

    Raises:
        JsonError: the message names the problem (and the JSON path, for depth and strings).
    """
    if isinstance(data, bytes | bytearray):
        try:
            text = bytes(data).decode("utf-8")
        except UnicodeDecodeError as e:
            raise JsonError(f"not UTF-8 at byte {e.start}") from None
    else:
        text = data
    try:
        obj = _DECODER.decode(text)
    except JsonError:
        raise
    except RecursionError:
        raise JsonError(f"nested more than {max_depth} levels deep") from None
    except ValueError as e:  # json.JSONDecodeError, or an integer of too many digits
        raise JsonError(f"not valid JSON: {e}") from None
    strings = _SUSPECT_ESCAPE.search(text) is not None
    # Fewer brackets in the whole text than the bound (counted in C): the depth cannot exceed it.
    if strings or text.count("[") + text.count("{") > max_depth:
        _check(obj, max_depth, strings)
    return obj
