"""Algorithms by name or by file: the built-ins, and user files compiled and checked once.

:mod:`livedyn.algorithms.user` compiles a file; :mod:`livedyn.checks` runs the compiled file
through a :class:`~livedyn.processor.Processor` on a synthesised test programme. This module
sits above both: it resolves a file's path, reads it, compiles and checks each version (by
content) once per process, and keeps every version it loaded alive for the process's life (a
live swap may still be crossfading from an older version's compiled code).

>>> from livedyn.loader import get
>>> get("compressor").name
'compressor'
"""
from __future__ import annotations

import dataclasses
import os
import threading

from . import algorithms
from .algorithms import Algorithm
from .algorithms.user import UserAlgorithmError, compile_file, is_user_file, read_source
from .checks import check_algorithm

__all__ = ["get", "load", "is_user_file", "UserAlgorithmError"]

_CACHE = {}  # (path, digest, checked) -> Algorithm: each version is compiled and checked once
_CACHE_LOCK = threading.Lock()


def load(path, check=True) -> Algorithm:
    """Load, compile and check a user algorithm file; returns an Algorithm.

    Raises UserAlgorithmError (one line; ``.detail`` for the full message) when the file cannot
    be read, does not compile in nopython mode, or fails a safety check. Each version of a file
    (by content) is compiled and checked once per process."""
    path, source, digest = read_source(path)
    with _CACHE_LOCK:
        got = _CACHE.get((path, digest, check))
    if got is not None:
        return got
    if check and hasattr(os, "fork"):
        # the file's code runs first in child processes with a time and memory limit: its top
        # level, then (once compiled here) the checks (livedyn/vet.py)
        from .vet import vet_checks, vet_import

        vet_import(path, source, digest)
        alg = compile_file(path, source, digest)
        alg = dataclasses.replace(alg, report=vet_checks(alg).report)
    else:
        alg = compile_file(path, source, digest)
        if check:
            alg = check_algorithm(alg)
    with _CACHE_LOCK:
        _CACHE[(path, digest, check)] = alg
    return alg


def get(spec) -> Algorithm:
    """An Algorithm from a built-in name, an algorithm file ``FILE.py``, or an Algorithm."""
    if not isinstance(spec, Algorithm) and is_user_file(spec):
        return load(spec)
    return algorithms.get(spec)
