"""Messages of the console: the one-line errors its actions raise, the status message, and
the log of every message with its time (the message area shows the latest, wrapped; the log
view scrolls through all of them). Owns :class:`ConsoleError`, :class:`Status`,
:func:`one_line` and :class:`MessageLog`; nothing else lives here."""
from __future__ import annotations

import time
from collections import deque
from dataclasses import dataclass

from ..params import ParamError
from . import commands as cmds

#: Messages the log keeps (the oldest go first).
LOG_DEPTH = 2000


class ConsoleError(Exception):
    """A console action that cannot be done; the message is one line for the status area."""


@dataclass
class Status:
    """The one status line: ``kind`` is "info", "warn" or "error"."""

    text: str
    kind: str = "info"



def one_line(err) -> str:
    """An exception (or text) as one status line."""
    text = str(err).strip()
    line = text.splitlines()[0] if text else ""
    if isinstance(err, (ParamError, ConsoleError, cmds.CommandError)):
        return line or type(err).__name__
    name = type(err).__name__ if isinstance(err, BaseException) else ""
    return f"{name}: {line}" if name and line else (line or name or "error")


class MessageLog:
    """Every message shown, with the wall-clock time it was shown, oldest first.

    A message repeated at once (the same text and kind) is counted, not stored again."""

    def __init__(self, depth=LOG_DEPTH, clock=time.time):
        self.entries = deque(maxlen=depth)  # [time, kind, text, count]
        self.clock = clock

    def add(self, status: Status):
        if not status.text:
            return
        if self.entries and self.entries[-1][1:3] == [status.kind, status.text]:
            self.entries[-1][3] += 1
            return
        self.entries.append([float(self.clock()), status.kind, status.text, 1])

    def lines(self):
        """The log as plain lines: 'HH:MM:SS  kind  text (xN)'."""
        out = []
        for t, kind, text, count in self.entries:
            stamp = time.strftime("%H:%M:%S", time.localtime(t))
            more = f" (x{count})" if count > 1 else ""
            out.append(f"{stamp}  {kind:<5}  {text}{more}")
        return out
