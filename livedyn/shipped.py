"""Where livedyn's package data lives, and where it may write a cache.

The shipped presets (``livedyn/presets/``), the example algorithm files
(``livedyn/examples/``), the C twin's source (``livedyn/bench/ctwin/``) and the bare-C loops
(``livedyn/bench/bare/``) are package data:
they are found through :mod:`importlib.resources`, so that a plain wheel install works from
any folder, exactly as the source tree does. Nothing is written into the package: builds go to
the user's cache folder (:func:`cache_folder`).

This module imports nothing of livedyn, so that every layer may use it.
"""
from __future__ import annotations

import os
from importlib import resources
from pathlib import Path

__all__ = ["package_folder", "presets_folder", "examples_folder", "ctwin_source",
           "bare_source", "cache_folder"]


def package_folder(*parts) -> Path:
    """A folder or file of livedyn's package data, as a file-system path.

    Raises
    ------
    RuntimeError
        When livedyn is installed somewhere that is not a folder on disk (a zip file): its
        data files then cannot be opened by path.
    """
    where = resources.files("livedyn").joinpath(*parts)
    if isinstance(where, Path):
        return where
    raise RuntimeError(f"livedyn's package data {'/'.join(parts)} is not on disk ({where}); "
                       "install livedyn from a wheel or a source folder, not as a zip file")


def presets_folder() -> Path:
    """The folder of the shipped presets (``livedyn/presets``)."""
    return package_folder("presets")


def examples_folder() -> Path:
    """The folder of the shipped example algorithm files (``livedyn/examples``)."""
    return package_folder("examples")


def ctwin_source() -> Path:
    """The C source of the bench's plain-C twin of the fused kernels."""
    return package_folder("bench", "ctwin", "kernels.c")


def bare_source() -> Path:
    """The C source of the bench's bare-C reference loops (it includes ``loops.h`` beside it)."""
    return package_folder("bench", "bare", "bare.c")


def cache_folder(*parts) -> Path:
    """A folder in the user's cache: ``$XDG_CACHE_HOME/livedyn`` (default ``~/.cache/livedyn``).

    Not created here; the caller makes it when it writes. The XDG Base Directory
    Specification defines ``XDG_CACHE_HOME`` and its default.

    References
    ----------
    .. [1] XDG Base Directory Specification, version 0.8,
       https://specifications.freedesktop.org/basedir-spec/
    """
    base = os.environ.get("XDG_CACHE_HOME", "")
    root = Path(base) if base and Path(base).is_absolute() else Path.home() / ".cache"
    return root.joinpath("livedyn", *parts)
