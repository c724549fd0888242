"""Limits on the size of what livedyn parses: work is bounded by the input's real size, never by
a number or a nesting inside it.

Text files (presets, automation) are refused line by line before they are parsed when a line
is too long or brackets nest too deep; parsed documents are refused when a key is too long or
a number too large. Every refusal is one line naming the file, the line where known, and the
limit. The limits are livedyn's own (common practice, no source): far above anything a preset
or an automation file needs, far below what would cost noticeable time or memory.
"""
from __future__ import annotations

__all__ = ["MAX_LINE", "MAX_DEPTH", "MAX_KEY", "MAX_NUMBER", "check_lines", "check_depth",
           "check_doc"]

#: Characters in one line of a preset or automation file.
MAX_LINE = 4096
#: Brackets or braces open at once in a preset (a preset needs 1).
MAX_DEPTH = 16
#: Characters in one key of a preset.
MAX_KEY = 128
#: Largest magnitude of a whole number in a preset (above it a float cannot hold it exactly).
MAX_NUMBER = 2**53


def check_lines(name: str, text: str, error) -> None:
    """Refuse a line longer than :data:`MAX_LINE` characters."""
    start = 0
    lineno = 1
    n = len(text)
    while start < n:
        end = text.find("\n", start)
        if end < 0:
            end = n
        if end - start > MAX_LINE:
            raise error(f"{name}:{lineno}: line of {end - start} characters, expected at most "
                        f"{MAX_LINE}")
        start = end + 1
        lineno += 1


def check_depth(name: str, text: str, error) -> None:
    """Refuse TOML whose arrays and inline tables nest deeper than :data:`MAX_DEPTH`.

    Brackets inside strings and comments are not counted (a scan of the TOML string forms:
    basic and literal, single-line and multi-line).
    """
    depth = 0
    lineno = 1
    i = 0
    n = len(text)
    while i < n:
        c = text[i]
        if c == "\n":
            lineno += 1
        elif c == "#":
            j = text.find("\n", i)
            i = n if j < 0 else j
            continue
        elif c in "\"'":
            triple = text.startswith(c * 3, i)
            q = c * 3 if triple else c
            j = i + len(q)
            while True:
                k = text.find(q, j)
                if k < 0:
                    return  # an unterminated string: the TOML parser says where
                if c == '"' and _escaped(text, k):
                    j = k + 1
                    continue
                break
            lineno += text.count("\n", i, k)
            i = k + len(q)
            continue
        elif c in "[{":
            depth += 1
            if depth > MAX_DEPTH:
                raise error(f"{name}:{lineno}: brackets nested more than {MAX_DEPTH} deep, "
                            f"expected a flat preset")
        elif c in "]}":
            depth = max(0, depth - 1)
        i += 1


def _escaped(text, k):
    b = 0
    while k - 1 - b >= 0 and text[k - 1 - b] == "\\":
        b += 1
    return b % 2 == 1


def check_doc(name: str, doc, error, where=None) -> None:
    """Refuse a key longer than :data:`MAX_KEY` or a whole number beyond :data:`MAX_NUMBER`
    anywhere in a parsed document (``where(key)`` gives the line for a key, or None)."""
    from .outputs import short

    stack = [(doc, "")]
    while stack:
        node, path = stack.pop()
        items = node.items() if isinstance(node, dict) else enumerate(node)
        for k, v in items:
            key = f"{path}.{k}" if path and isinstance(k, str) else (k if isinstance(k, str)
                                                                      else path)
            if isinstance(k, str) and len(k) > MAX_KEY:
                raise error(f"{name}: key {short(k, 40)!r} of {len(k)} characters, expected at "
                            f"most {MAX_KEY}")
            if isinstance(v, bool):
                continue
            if isinstance(v, int) and abs(v) > MAX_NUMBER:
                line = where(k) if where is not None and isinstance(k, str) else None
                at = f":{line}" if line else ""
                digits = len(str(abs(v))) if abs(v) < 10**4000 else ">4000"
                raise error(f"{name}{at}: {key} = a number of {digits} digits, expected at "
                            f"most {MAX_NUMBER} in magnitude")
            if isinstance(v, (dict, list)):
                stack.append((v, key))
