"""Files that are never half written: atomic replacement, durable renames, target checks.

Every writer in livedyn (presets, automation files, WAV and RF64 takes, JSON reports, the
record folder's version log) writes a new temporary file in the target's folder and renames it
onto the target only when it is complete, so a failed or interrupted write leaves an existing
file byte for byte as it was. The pieces:

- :func:`target_problem`: why a path cannot be a file target (a directory, a missing folder);
  callers raise their own one-line error from it before any work is done.
- :func:`reserve_temp`: a new, exclusively created temporary file beside a target.
- :func:`write_text_atomic`: the whole sequence for a text file.
- :func:`fsync_dir`: make a rename in a folder durable.
- :func:`read_text_file`: read a small UTF-8 text file, every failure as one line.

``os.replace`` is atomic within one file system on POSIX and Windows (Python's ``os``
documentation); the folder is fsynced afterwards so that the rename survives a power cut
(POSIX ``fsync``; common practice for durable renames, no further source).

This module imports nothing of livedyn: every layer may use it.
"""
from __future__ import annotations

import os
import secrets
from pathlib import Path

__all__ = ["target_problem", "reserve_temp", "write_text_atomic", "fsync_dir", "read_text_file"]


def target_problem(path, what="file") -> str | None:
    """Why ``path`` cannot be written as a ``what``, or None.

    Returns ``"is a directory, expected a <what> path"``, ``"folder F does not exist"`` or, for
    an existing FIFO or device, ``"not a regular file ..."`` (only regular files are replaced); the
    caller prefixes the path it was given and raises its own error type.
    """
    p = Path(path)
    if p.is_dir():
        return f"is a directory, expected a {what} path"
    if not p.parent.is_dir():
        return f"folder {p.parent} does not exist"
    if p.exists() and not p.is_file():
        return f"not a regular file (a FIFO or a device), expected a {what} path or a new name"
    return None


def reserve_temp(target, flags=os.O_WRONLY):
    """A new temporary file in ``target``'s folder: ``(path, fd)``.

    The name is ``.<target name>.<8 hex digits>.tmp``, created with ``O_CREAT | O_EXCL`` (so two
    writers never share one), mode 0o666 less the umask. Raises OSError from the file system.
    """
    target = Path(target)
    folder = target.parent
    while True:
        tmp = folder / f".{target.name}.{secrets.token_hex(4)}.tmp"
        try:
            return tmp, os.open(tmp, flags | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            continue


def write_text_atomic(path, text: str) -> None:
    """Write ``text`` (UTF-8) to ``path`` atomically.

    The text goes to a new temporary file in the target's folder, which is flushed, fsynced and
    renamed onto the target with :func:`os.replace` (atomic on POSIX and Windows within one
    filesystem); the folder is then fsynced so the rename survives a power cut. On any failure
    the temporary file is removed and an existing target is left untouched. The new file gets
    the default permissions (0o666 less the umask), or those of the file it replaces.

    Raises OSError from the file system (callers wrap it into their own one-line error).
    """
    target = Path(path)
    data = text.encode("utf-8")
    try:
        mode = target.stat().st_mode & 0o7777
    except OSError:
        mode = None
    tmp, fd = reserve_temp(target)
    try:
        try:
            view = memoryview(data)
            while view:
                n = os.write(fd, view)
                view = view[n:]
            if mode is not None and hasattr(os, "fchmod"):
                os.fchmod(fd, mode)
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, target)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    fsync_dir(target.parent)


def fsync_dir(folder) -> None:
    """Make a rename in ``folder`` durable (best effort)."""
    try:
        dfd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(dfd)
    except OSError:
        pass  # some file systems refuse fsync on a directory; the rename itself is done
    finally:
        os.close(dfd)


def read_text_file(path, error, what, max_bytes) -> str:
    """Read a small UTF-8 text file, turning every way it can fail into one ``error`` line.

    Refuses a missing file, a directory or other non-regular file, an unreadable file, a file
    over ``max_bytes``, an empty file, binary data (a NUL byte) and text that is not UTF-8
    (naming the line and offset). A UTF-8 byte-order mark is dropped.
    """
    p = Path(path)
    name = str(path)
    try:
        st = p.stat()
    except FileNotFoundError:
        raise error(f"{name}: no such file, expected a {what} file") from None
    except OSError as e:
        raise error(f"{name}: cannot read: {e.strerror or e}") from None
    if p.is_dir():
        raise error(f"{name}: is a directory, expected a {what} file")
    if not p.is_file():
        raise error(f"{name}: not a regular file, expected a {what} file")
    if st.st_size > max_bytes:
        raise error(f"{name}: {st.st_size} bytes is too large for a {what} (limit {max_bytes})")
    try:
        data = p.read_bytes()
    except OSError as e:
        raise error(f"{name}: cannot read: {e.strerror or e}") from None
    if not data.strip():
        raise error(f"{name}: empty file, expected a {what}")
    nul = data.find(b"\x00")
    if nul >= 0:
        raise error(
            f"{name}: binary data (NUL byte at offset {nul}), expected a {what} as UTF-8 text"
        )
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as e:
        line = data[: e.start].count(b"\n") + 1
        raise error(
            f"{name}:{line}: not UTF-8 text (byte 0x{data[e.start]:02x} at offset {e.start}), "
            f"expected a {what} saved as UTF-8"
        ) from None
    return text[1:] if text.startswith("\ufeff") else text
