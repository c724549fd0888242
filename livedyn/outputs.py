"""The output guard: every path a command will write, checked before anything is opened.

A command describes what it reads and what it will write to an :class:`Outputs` and calls
:meth:`Outputs.check` before it opens a file. The check refuses, with one line naming the
option and the path:

* a write target that is the same file as something the command reads, or as another write
  target: compared by resolved path (symbolic links followed) and, for files that exist, by
  device and inode (so a hard link or a bind mount is caught too);
* a target that exists and is not a regular file (a directory, a FIFO, a device, a socket):
  only regular files are replaced, and new names created;
* a target whose folder does not exist, or a symbolic-link loop.

A take folder (``run --record``) that already holds a take is never written into: the check
picks the first free numbered folder beside it (``R-2``, ``R-3``, ...) and says so in one
line; targets the command was asked to write inside the old folder (``--stats-json
R/stats.json``) move with it. Replaced files keep their permission bits: the writers
(:class:`livedyn.wavio.WavWriter`, :func:`livedyn.presets.write_text_atomic`) copy the old
mode.

Layering: offline level, imports nothing of livedyn.
"""
from __future__ import annotations

import errno
import os
import stat

__all__ = ["OutputError", "Outputs", "check_target", "short", "TAKE_FILES"]

#: The files of a take: a folder holding any of them holds a take.
TAKE_FILES = ("main.wav", "key.wav", "out.wav", "automation.txt", "versions.txt")

#: Longest value echoed in an error line (the rest is elided; a choice of ours, no source).
SHORT = 80


class OutputError(ValueError):
    """A path a command must not write; one line naming the option and the path."""


def short(value, limit: int = SHORT) -> str:
    """``str(value)`` cut to about ``limit`` characters, saying how much was left out."""
    s = str(value)
    if len(s) <= limit:
        return s
    return f"{s[:limit - 20]}...({len(s)} characters)"


def _kind(mode) -> str:
    for test, name in ((stat.S_ISDIR, "a directory"), (stat.S_ISFIFO, "a FIFO (named pipe)"),
                       (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"),
                       (stat.S_ISSOCK, "a socket"), (stat.S_ISREG, "a file")):
        if test(mode):
            return name
    return "not a regular file"


def _stat(option, path):
    """os.stat of ``path`` (following links), None when it does not exist."""
    try:
        return os.stat(path)
    except FileNotFoundError:
        return None
    except OSError as e:
        if e.errno == errno.ELOOP:
            raise OutputError(f"{option} {short(path)}: a loop of symbolic links, expected a "
                              "file path") from None
        if e.errno == errno.ENOTDIR:
            raise OutputError(f"{option} {short(path)}: a part of the path is a file, "
                              "expected folders") from None
        if e.errno == errno.ENAMETOOLONG:
            raise OutputError(f"{option} {short(path)}: name too long") from None
        raise OutputError(f"{option} {short(path)}: {e.strerror or e}") from None


def _real(path) -> str:
    return os.path.realpath(os.path.abspath(os.fspath(path)))


def check_target(path, option: str, *, folder: bool = False) -> None:
    """Refuse one write target on its own: it must be a regular file (a folder when
    ``folder``) or a new name in an existing folder."""
    p = os.fspath(path)
    if p == "":
        raise OutputError(f"{option} '': expected a {'folder' if folder else 'file'} path")
    st = _stat(option, p)
    if st is not None:
        if folder:
            if not stat.S_ISDIR(st.st_mode):
                raise OutputError(f"{option} {short(p)}: is {_kind(st.st_mode)}, expected a "
                                  "folder")
        elif not stat.S_ISREG(st.st_mode):
            raise OutputError(f"{option} {short(p)}: is {_kind(st.st_mode)}, expected a "
                              "regular file or a new name")
        return
    parent = os.path.dirname(_real(p)) or "."
    pst = _stat(option, parent)
    if pst is None or not stat.S_ISDIR(pst.st_mode):
        shown = os.path.dirname(p) or "."
        raise OutputError(f"{option} {short(p)}: folder {short(shown)} does not exist")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"{option} {short(p)}: cannot write in folder "
                          f"{short(os.path.dirname(p) or '.')} (permission denied)")


class Outputs:
    """What one command reads and writes; :meth:`check` before opening anything.

    Examples
    --------
    >>> g = Outputs()                                              # doctest: +SKIP
    >>> g.read("IN.wav", "in.wav"); g.write("--out", "out.wav")   # doctest: +SKIP
    >>> g.check()                                                  # doctest: +SKIP
    """

    def __init__(self):
        self._reads = []    # (option, path)
        self._writes = []   # (option, path)
        self._folders = []  # (option, path, names in it)
        self._take = None   # (option, path, names)
        self.notes = []     # lines to show the user (a renumbered take)
        self._final = {}

    def read(self, option: str, path) -> None:
        """Something the command reads (None is ignored)."""
        if path is not None:
            self._reads.append((option, os.fspath(path)))

    def write(self, option: str, path) -> None:
        """A file the command will write or replace (None is ignored)."""
        if path is not None:
            self._writes.append((option, os.fspath(path)))

    def folder(self, option: str, path, names=()) -> None:
        """A folder the command creates if needed and writes ``names`` into."""
        if path is not None:
            self._folders.append((option, os.fspath(path), tuple(names)))

    def take(self, option: str, path, names=TAKE_FILES) -> None:
        """The take folder (one per command): renumbered when it holds a take already."""
        if path is not None:
            self._take = (option, os.fspath(path), tuple(names))

    # ---------------------------------------------------------------------------------------
    def _take_folder(self):
        option, path, names = self._take
        check_target(path, option, folder=True)
        if not os.path.isdir(path) or not any(os.path.lexists(os.path.join(path, n))
                                              for n in names):
            return path
        base = path.rstrip("/\\") or path
        n = 2
        while os.path.lexists(f"{base}-{n}"):
            n += 1
        new = f"{base}-{n}"
        self.notes.append(f"{option} {short(path)} holds a take already: recording to "
                          f"{short(new)}/ instead")
        return new

    def check(self) -> dict:
        """Check everything; returns ``{"take": final take folder or None}``.

        Raises :class:`OutputError` (one line) on the first problem found.
        """
        take = None
        writes = list(self._writes)
        self._final = {}
        if self._take is not None:
            option, old, names = self._take
            take = self._take_folder()
            if take != old:  # targets asked for inside the old folder move with it
                old_real = _real(old)
                moved = []
                for opt, p in writes:
                    rp = _real(p)
                    if os.path.dirname(rp) == old_real:
                        self._final[p] = os.path.join(take, os.path.basename(rp))
                        p = self._final[p]
                    moved.append((opt, p))
                writes = moved
            writes += [(option, os.path.join(take, n)) for n in names]
        for option, path, names in self._folders:
            check_target(path, option, folder=True)
            writes += [(option, os.path.join(path, n)) for n in names]
        # files inside a folder still to be made need no folder check of their own
        new_folders = {_real(f) for f in [take] + [f for _, f, _ in self._folders]
                       if f is not None and not os.path.isdir(f)}
        seen = []  # (option, path, real, (dev, ino) or None)
        for option, path in self._reads:
            st = _stat(option, path)
            seen.append((option, path, _real(path), (st.st_dev, st.st_ino) if st else None,
                         "read"))
        for option, path in writes:
            if os.path.dirname(_real(path)) in new_folders:
                st = None
            else:
                check_target(path, option)
                st = _stat(option, path)
            real = _real(path)
            ident = (st.st_dev, st.st_ino) if st else None
            for o2, p2, r2, i2, how in seen:
                if real == r2 or (ident is not None and ident == i2):
                    what = "reads" if how == "read" else "writes"
                    raise OutputError(
                        f"{option} {short(path)}: is the same file as {o2} {short(p2)}, which "
                        f"the command {what}; choose another name")
            seen.append((option, path, real, ident, "write"))
        return {"take": take}

    def moved(self, path):
        """Where a write target asked for as ``path`` ends up (it moves with a renumbered
        take); after :meth:`check`."""
        if path is None:
            return None
        return self._final.get(os.fspath(path), path)
