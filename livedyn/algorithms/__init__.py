"""Built-in processors: each is a parameter schema plus a fused per-block kernel.

``get(name)`` returns the :class:`Algorithm`; ``names()`` lists the built-ins.
"""
from __future__ import annotations

from .builtin import BUILTINS, Algorithm, AlgorithmError

__all__ = ["Algorithm", "AlgorithmError", "get", "names", "BUILTINS"]


def names():
    return list(BUILTINS)


def get(name) -> Algorithm:
    """The built-in algorithm called ``name``."""
    if isinstance(name, Algorithm):
        return name
    from .user import is_user_file, load

    if is_user_file(name):
        return load(name)
    try:
        return BUILTINS[str(name).strip().lower()]
    except KeyError:
        raise AlgorithmError(
            f"unknown algorithm {name!r}: expected one of {', '.join(BUILTINS)}"
        ) from None
