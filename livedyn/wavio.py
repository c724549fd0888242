"""WAV files in and out, streamed in blocks of float32 ``(frames, channels)``.

Reading accepts RIFF/WAVE (``WAV``, ``WAVEX``) and ``RF64`` files with 1 to 8 channels of
16-, 24- or 32-bit integer PCM or 32-bit float, and 64-bit float (read as float32). Integer
samples read as ``n / 2**(bits-1)``, so full-scale negative is exactly -1.0.

Writing quantises float samples to integer PCM as ``round(x * 2**(bits-1))`` (round half to
even, no dither), clipped to the integer range; that is the exact inverse of the reading rule,
so a file read and written again at the same depth keeps every sample. 32-bit float is written
as it comes.

File size and RF64
------------------
A RIFF/WAVE file counts its sizes in 32 bits, so its data cannot pass 4 GiB; RF64
(EBU Tech 3306) carries 64-bit sizes in a ``ds64`` chunk. With ``container="auto"`` (the
default) the writer opens an RF64 file and asks libsndfile to downgrade it on close
(``SFC_RF64_AUTO_DOWNGRADE``): the header space is reserved in a ``JUNK`` chunk, and at close a
file under 4 GiB becomes a plain RIFF/WAVE file (with a WAVE_FORMAT_EXTENSIBLE format chunk),
a larger one stays RF64. The decision is made on the size actually written, so no estimate is
needed. If that libsndfile command is not available, the writer decides up front with
:func:`needs_rf64` from ``frames_hint`` (no hint: RF64). ``container="WAV"`` writes plain RIFF
and refuses to pass the limit; ``container="RF64"`` always writes RF64.

Atomic writes
-------------
:class:`WavWriter` writes to a temporary file in the target's folder and renames it onto the
target only when closed normally. When the ``with`` block raises (or :meth:`WavWriter.abort` is
called) the temporary file is removed and an existing target is left untouched.

Errors raise :class:`WavError` (a ValueError) with one line naming the file and the problem.

References
----------
.. [1] EBU Tech 3306, "MBWF / RF64: An extended File Format for Audio", European Broadcasting
   Union, 2009 (the ``ds64`` chunk, the ``JUNK`` placeholder for a later upgrade/downgrade).
.. [2] libsndfile, http://libsndfile.github.io/libsndfile/ (``sf_command``,
   ``SFC_RF64_AUTO_DOWNGRADE``).
"""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import soundfile as sf

from .files import fsync_dir, reserve_temp, target_problem

__all__ = [
    "WavError",
    "WavReader",
    "WavWriter",
    "read_wav",
    "write_wav",
    "needs_rf64",
    "data_bytes",
    "choose_container",
    "READ_FORMATS",
    "READ_SUBTYPES",
    "WRITE_SUBTYPES",
    "MAX_CHANNELS",
    "WAV_DATA_LIMIT",
]

READ_FORMATS = ("WAV", "WAVEX", "RF64")
READ_SUBTYPES = ("PCM_16", "PCM_24", "PCM_32", "FLOAT", "DOUBLE")
WRITE_SUBTYPES = ("PCM_16", "PCM_24", "PCM_32", "FLOAT")
MAX_CHANNELS = 8
BYTES_PER_SAMPLE = {"PCM_16": 2, "PCM_24": 3, "PCM_32": 4, "FLOAT": 4, "DOUBLE": 8}
_INT_BITS = {"PCM_16": 16, "PCM_24": 24, "PCM_32": 32}
#: Largest data chunk we put in a plain RIFF/WAVE file: the 32-bit RIFF size field counts up to
#: 2**32 - 1 bytes for the whole file; 1 KiB is left for the header and other chunks
#: (a margin of ours, no source).
WAV_DATA_LIMIT = 2**32 - 1024
# libsndfile command number of SFC_RF64_AUTO_DOWNGRADE (sndfile.h); soundfile does not name it.
_SFC_RF64_AUTO_DOWNGRADE = 0x1210
CONTAINERS = ("auto", "WAV", "RF64")


class WavError(ValueError):
    """A WAV file that cannot be read or written; the message is one line naming the file."""


def data_bytes(frames: int, channels: int, subtype: str) -> int:
    """Bytes of sample data for ``frames`` frames of ``channels`` channels of ``subtype``."""
    return int(frames) * int(channels) * BYTES_PER_SAMPLE[subtype]


def needs_rf64(frames: int, channels: int, subtype: str) -> bool:
    """Whether that much data is too large for a plain RIFF/WAVE file (> WAV_DATA_LIMIT)."""
    return data_bytes(frames, channels, subtype) > WAV_DATA_LIMIT


def choose_container(frames_hint, channels: int, subtype: str) -> str:
    """The container to use when libsndfile cannot downgrade RF64 on close.

    ``"RF64"`` when ``frames_hint`` is None (the size is unknown) or the data would pass
    :data:`WAV_DATA_LIMIT`, else ``"WAV"``.
    """
    if frames_hint is None or needs_rf64(frames_hint, channels, subtype):
        return "RF64"
    return "WAV"


def _libsndfile_message(e: Exception) -> str:
    s = getattr(e, "error_string", None) or str(e)
    return " ".join(str(s).split()).rstrip(".")


# ---------------------------------------------------------------------------------------------


class WavReader:
    """A WAV/WAVEX/RF64 file opened for reading in blocks.

    Parameters
    ----------
    path : str or os.PathLike

    Attributes
    ----------
    samplerate : int
    channels : int
    frames : int
    subtype : str
        ``PCM_16``, ``PCM_24``, ``PCM_32``, ``FLOAT`` or ``DOUBLE``.
    format : str
        ``WAV``, ``WAVEX`` or ``RF64``.

    Examples
    --------
    >>> with WavReader("in.wav") as r:                       # doctest: +SKIP
    ...     for block in r.blocks(1024):
    ...         ...
    """

    def __init__(self, path):
        self.path = Path(path)
        name = str(path)
        self._name = name
        self._f = None
        p = self.path
        if not p.exists():
            raise WavError(f"{name}: no such file, expected a WAV file")
        if p.is_dir():
            raise WavError(f"{name}: is a directory, expected a WAV file")
        if not p.is_file():
            raise WavError(f"{name}: not a regular file, expected a WAV file")
        if not os.access(p, os.R_OK):
            raise WavError(f"{name}: cannot read: permission denied")
        try:
            f = sf.SoundFile(name, "r")
        except (sf.SoundFileError, RuntimeError, OSError) as e:
            raise WavError(
                f"{name}: not a readable WAV file (libsndfile: {_libsndfile_message(e)})"
            ) from None
        try:
            if f.format not in READ_FORMATS:
                desc = sf.available_formats().get(f.format, f.format)
                raise WavError(f"{name}: {desc} file, expected WAV, WAVEX or RF64")
            if not 1 <= f.channels <= MAX_CHANNELS:
                raise WavError(
                    f"{name}: {f.channels} channels, expected 1 to {MAX_CHANNELS}")
            if f.subtype not in READ_SUBTYPES:
                desc = sf.available_subtypes().get(f.subtype, f.subtype)
                raise WavError(
                    f"{name}: sample format {f.subtype} ({desc}) is not supported, expected "
                    f"one of {', '.join(READ_SUBTYPES)}")
            if f.samplerate <= 0:
                raise WavError(f"{name}: sample rate {f.samplerate}, expected above 0")
        except BaseException:
            f.close()
            raise
        self._f = f
        self.samplerate = int(f.samplerate)
        self.channels = int(f.channels)
        self.frames = int(f.frames)
        self.subtype = f.subtype
        self.format = f.format

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def close(self):
        if self._f is not None:
            self._f.close()
            self._f = None

    @property
    def closed(self) -> bool:
        return self._f is None

    def __del__(self):
        try:
            self.close()
        except Exception:
            pass

    def _file(self):
        if self._f is None:
            raise WavError(f"{self._name}: reader is closed")
        return self._f

    def blocks(self, n: int):
        """Yield float32 ``(frames, channels)`` blocks of ``n`` frames from the current place.

        The last block may be shorter; nothing is yielded at the end of the file.
        """
        if isinstance(n, bool) or int(n) != n or n < 1:
            raise WavError(f"{self._name}: block size {n!r}, expected a whole number >= 1")
        n = int(n)
        f = self._file()
        while True:
            block = f.read(n, dtype="float32", always_2d=True)
            if block.shape[0] == 0:
                return
            yield np.ascontiguousarray(block)
            if block.shape[0] < n:
                return

    def read(self, frames: int = -1) -> np.ndarray:
        """Read ``frames`` frames (all that remain if negative) as float32 ``(frames, ch)``."""
        return np.ascontiguousarray(self._file().read(frames, dtype="float32", always_2d=True))

    def seek(self, frame: int) -> None:
        """Move to ``frame`` (0 is the start)."""
        if not 0 <= frame <= self.frames:
            raise WavError(f"{self._name}: frame {frame}, expected 0 to {self.frames}")
        self._file().seek(int(frame))

    def __repr__(self):
        return (f"WavReader({self._name!r}, {self.samplerate} Hz, {self.channels} ch, "
                f"{self.frames} frames, {self.subtype}, {self.format})")


def read_wav(path):
    """Read a whole file: ``(float32 array (frames, channels), samplerate)``."""
    with WavReader(path) as r:
        return r.read(), r.samplerate


# ---------------------------------------------------------------------------------------------


class WavWriter:
    """A WAV file written in blocks and committed atomically on close.

    Parameters
    ----------
    path : str or os.PathLike
        The target; its folder must exist. An existing file is replaced only on commit.
    samplerate : int
    channels : int
        1 to 8.
    subtype : str
        ``"FLOAT"`` (default), ``"PCM_16"``, ``"PCM_24"`` or ``"PCM_32"``.
    frames_hint : int, optional
        Expected number of frames; used to pick plain WAV or RF64 only when libsndfile cannot
        downgrade RF64 itself, and to refuse early with ``container="WAV"``.
    container : {"auto", "WAV", "RF64"}
        See the module notes.

    Notes
    -----
    Use as a context manager: a normal exit commits (renames onto ``path``), an exception
    discards. Integer subtypes refuse non-finite samples (they have no integer value); float
    files store them as they are.
    """

    def __init__(self, path, samplerate, channels, subtype="FLOAT", frames_hint=None,
                 container="auto"):
        self.path = Path(path)
        name = str(path)
        self._name = name
        self._sf = None
        self._fd = None
        self._tmp = None
        if isinstance(samplerate, bool) or int(samplerate) != samplerate or samplerate <= 0:
            raise WavError(f"{name}: sample rate {samplerate!r}, expected a whole number of Hz "
                           f"above 0")
        if isinstance(channels, bool) or int(channels) != channels or \
                not 1 <= channels <= MAX_CHANNELS:
            raise WavError(f"{name}: {channels!r} channels, expected 1 to {MAX_CHANNELS}")
        subtype = str(subtype).upper()
        if subtype not in WRITE_SUBTYPES:
            raise WavError(f"{name}: sample format {subtype!r} is not supported for writing, "
                           f"expected one of {', '.join(WRITE_SUBTYPES)}")
        if frames_hint is not None and (isinstance(frames_hint, bool)
                                        or int(frames_hint) != frames_hint or frames_hint < 0):
            raise WavError(f"{name}: frames_hint {frames_hint!r}, expected a whole number >= 0")
        if container not in CONTAINERS:
            raise WavError(f"{name}: container {container!r}, expected one of "
                           f"{', '.join(CONTAINERS)}")
        problem = target_problem(self.path, "WAV file")
        if problem:
            raise WavError(f"{name}: {problem}")
        folder = self.path.parent
        if container == "WAV" and frames_hint is not None and \
                needs_rf64(frames_hint, channels, subtype):
            raise WavError(
                f"{name}: {frames_hint} frames = {data_bytes(frames_hint, channels, subtype)} "
                f"bytes, over the {WAV_DATA_LIMIT}-byte WAV limit, expected container 'auto' "
                f"or 'RF64'")
        self.samplerate = int(samplerate)
        self.channels = int(channels)
        self.subtype = subtype
        self.frames_hint = None if frames_hint is None else int(frames_hint)
        self.frames = 0
        self._bits = _INT_BITS.get(subtype)

        # Reserve a temporary name in the target's folder.
        try:
            tmp, fd = reserve_temp(self.path, os.O_RDWR)
        except OSError as e:
            raise WavError(f"{name}: cannot write in {folder}: {e.strerror or e}") from None
        self._tmp, self._fd = tmp, fd
        try:
            self.container = self._open(container)
        except BaseException:
            self.abort()
            raise

    def _open(self, container) -> str:
        fmt = "RF64" if container in ("auto", "RF64") else "WAV"
        try:
            f = sf.SoundFile(self._fd, "w", self.samplerate, self.channels, self.subtype,
                             format=fmt, closefd=False)
        except (sf.SoundFileError, RuntimeError, OSError) as e:
            raise WavError(f"{self._name}: cannot open for writing "
                           f"(libsndfile: {_libsndfile_message(e)})") from None
        self._sf = f
        if container != "auto":
            return container
        if _set_rf64_downgrade(f):
            return "auto"
        # libsndfile cannot downgrade: decide now from the hint.
        chosen = choose_container(self.frames_hint, self.channels, self.subtype)
        if chosen == "WAV":
            f.close()
            self._sf = None
            os.lseek(self._fd, 0, os.SEEK_SET)
            os.ftruncate(self._fd, 0)
            return self._open("WAV")
        return "RF64"

    # -- context manager -------------------------------------------------------------------
    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.close()
        else:
            self.abort()
        return False

    @property
    def closed(self) -> bool:
        return self._fd is None

    def write(self, block) -> None:
        """Append float samples, shape ``(frames, channels)`` (or ``(frames,)`` for mono)."""
        if self._sf is None:
            raise WavError(f"{self._name}: writer is closed")
        a = np.asarray(block)
        if a.ndim == 1 and self.channels == 1:
            a = a.reshape(-1, 1)
        if a.ndim != 2 or a.shape[1] != self.channels:
            raise WavError(f"{self._name}: block of shape {a.shape}, expected (frames, "
                           f"{self.channels})")
        if not np.issubdtype(a.dtype, np.floating):
            raise WavError(f"{self._name}: block of {a.dtype} samples, expected float32")
        n = a.shape[0]
        if n == 0:
            return
        if self.container == "WAV" and needs_rf64(self.frames + n, self.channels, self.subtype):
            raise WavError(f"{self._name}: more than {WAV_DATA_LIMIT} bytes of data do not fit "
                           f"a plain WAV file, expected container 'auto' or 'RF64'")
        if self._bits is None:
            data = np.ascontiguousarray(a, dtype=np.float32)
        else:
            if not np.isfinite(a).all():
                bad = int(np.argmin(np.isfinite(a).all(axis=1)))
                raise WavError(f"{self._name}: non-finite sample at frame {self.frames + bad}, "
                               f"expected finite samples for {self.subtype}")
            full = float(2 ** (self._bits - 1))
            q = np.rint(a.astype(np.float64) * full)
            np.clip(q, -full, full - 1.0, out=q)
            # libsndfile takes the top bits of an int32 sample for 16 and 24-bit files.
            data = q.astype(np.int32) << np.int32(32 - self._bits)
        try:
            self._sf.write(data)
        except (sf.SoundFileError, RuntimeError, OSError) as e:
            raise WavError(f"{self._name}: write failed "
                           f"(libsndfile: {_libsndfile_message(e)})") from None
        self.frames += n

    def close(self) -> None:
        """Finish the file and rename it onto the target (commit). Idempotent."""
        if self._fd is None:
            return
        try:
            self._sf.close()
            self._sf = None
            os.fsync(self._fd)
            os.close(self._fd)
            self._fd = None
            os.replace(self._tmp, self.path)
            self._tmp = None
        except BaseException as e:
            self.abort()
            if isinstance(e, OSError):
                raise WavError(f"{self._name}: cannot write: {e.strerror or e}") from None
            raise
        fsync_dir(self.path.parent)

    def abort(self) -> None:
        """Discard what was written: remove the temporary file; the target is untouched."""
        if self._sf is not None:
            try:
                self._sf.close()
            except Exception:
                pass
            self._sf = None
        if self._fd is not None:
            try:
                os.close(self._fd)
            except OSError:
                pass
            self._fd = None
        if self._tmp is not None:
            try:
                os.unlink(self._tmp)
            except OSError:
                pass
            self._tmp = None

    def __del__(self):
        try:
            self.abort()
        except Exception:
            pass

    def __repr__(self):
        return (f"WavWriter({self._name!r}, {self.samplerate} Hz, {self.channels} ch, "
                f"{self.subtype}, container={self.container!r}, {self.frames} frames)")


def write_wav(path, data, samplerate, subtype="FLOAT") -> None:
    """Write a whole float array ``(frames, channels)`` (or mono ``(frames,)``) atomically."""
    a = np.asarray(data)
    ch = 1 if a.ndim == 1 else a.shape[1]
    with WavWriter(path, samplerate, ch, subtype, frames_hint=a.shape[0]) as w:
        w.write(a)


def _set_rf64_downgrade(f) -> bool:
    """Ask libsndfile to write a plain RIFF/WAVE file on close when the data fits."""
    try:
        from soundfile import _ffi, _snd

        return _snd.sf_command(f._file, _SFC_RF64_AUTO_DOWNGRADE, _ffi.NULL, 1) == 1
    except Exception:
        return False
