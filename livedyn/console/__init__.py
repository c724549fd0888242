"""livedyn's full-screen text console.

``run_console(engine, title=...)`` runs it on the terminal until the user quits;
``build_app(engine, input=None, output=None)`` builds it for tests. The console talks to the
engine only through its control surface (see :mod:`livedyn.console.model`); the model and the
command parser import no screen library and can be used alone.
"""
from __future__ import annotations

__all__ = ["run_console", "build_app", "ConsoleModel"]


def __getattr__(name):
    # Lazy: `from livedyn.console.model import ConsoleModel` needs no prompt_toolkit.
    if name in ("run_console", "build_app"):
        from . import app

        return getattr(app, name)
    if name == "ConsoleModel":
        from .model import ConsoleModel

        return ConsoleModel
    raise AttributeError(name)
