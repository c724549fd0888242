"""Built-in processors: each is a parameter schema plus a fused per-block kernel.

``get(name)`` returns the :class:`Algorithm`; ``names()`` lists the built-ins. User files are
compiled by :mod:`.user` and loaded (checked) by :mod:`livedyn.loader`.
"""
from __future__ import annotations

from .builtin import BUILTINS, Algorithm, AlgorithmError

__all__ = ["Algorithm", "AlgorithmError", "get", "names", "BUILTINS"]


def names():
    return list(BUILTINS)


def get(name) -> Algorithm:
    """The built-in algorithm called ``name`` (an Algorithm is returned as it is).

    An algorithm file (``FILE.py``) is compiled and checked by :func:`livedyn.loader.load`,
    which runs a Processor and therefore sits above this package; ``livedyn.loader.get``
    takes names and files alike."""
    if isinstance(name, Algorithm):
        return name
    if str(name).endswith(".py"):
        raise AlgorithmError(f"{name}: an algorithm file; load it first with "
                             "livedyn.loader.load(path) (or livedyn.load_algorithm) and pass "
                             "the Algorithm")
    try:
        return BUILTINS[str(name).strip().lower()]
    except KeyError:
        raise AlgorithmError(
            f"unknown algorithm {name!r}: expected one of {', '.join(BUILTINS)}"
        ) from None
