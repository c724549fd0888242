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


def load(path, check=True, precision="float64") -> Algorithm:
    """Load, compile and check a user algorithm file; returns an Algorithm.

    ``precision`` ("float64" or "float32", see :mod:`livedyn.dsp.precision`) is the arithmetic
    the file's stages are compiled in; each precision is checked on its own. Raises
    UserAlgorithmError (one line; ``.detail`` for the full message) when the file cannot be
    read, does not compile in nopython mode, or fails a safety check. Each version of a file
    (by content) is compiled and checked once per process and precision."""
    from .dsp.precision import check as check_precision

    precision = check_precision(precision)
    path, source, digest = read_source(path)
    key = (path, digest, check, precision)
    with _CACHE_LOCK:
        got = _CACHE.get(key)
    if got is not None:
        return got
    if check and hasattr(os, "fork"):
        # the file's code runs first in child processes with a time and memory limit: its top
        # level, then (once compiled here) the checks (livedyn/vet.py)
        from .vet import vet_checks, vet_import

        vet_import(path, source, digest)
        alg = compile_file(path, source, digest, precision)
        alg = dataclasses.replace(alg, report=vet_checks(alg).report)
    else:
        alg = compile_file(path, source, digest, precision)
        if check:
            alg = check_algorithm(alg)
    with _CACHE_LOCK:
        _CACHE[key] = alg
    return alg


def get(spec, precision=None) -> Algorithm:
    """An Algorithm from a built-in name, an algorithm file ``FILE.py``, or an Algorithm.

    ``precision`` matters for files only (a built-in runs in either): a file, or the
    Algorithm of one, is returned compiled in that precision (default float64, or the
    Algorithm's own)."""
    if isinstance(spec, Algorithm):
        if spec.source is not None and precision is not None and spec.precision != precision:
            return load(spec.source, precision=precision)
        return spec
    if is_user_file(spec):
        return load(spec, precision=precision or "float64")
    return algorithms.get(spec)
