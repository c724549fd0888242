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
    "TakeWriter",
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
            try:  # a replaced file keeps its permission bits
                os.fchmod(self._fd, os.stat(self.path).st_mode & 0o7777)
            except (OSError, AttributeError):
                pass
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


# ---------------------------------------------------------------------------------------------
# Streamed takes: written under the final name, header kept up to date


#: Seconds between two header updates of a :class:`TakeWriter` (data flushed, then the sizes
#: patched): after a SIGKILL or a power loss a take loses at most about this much plus the
#: time the system needs to write back a flushed page (a choice of ours, no source).
TAKE_SYNC_SECONDS = 0.5

# WAVE_FORMAT_EXTENSIBLE sub-format GUIDs: the format tag (1 = PCM, 3 = IEEE float) followed by
# the fixed tail 00000000-0010-0080-00AA00389B71 (Microsoft, "Multiple channel audio data and
# WAVE files"; bytes as stored little-endian, recalled from memory and checked by reading the
# files back with libsndfile in tests/test_wavio.py).
_GUID_TAIL = bytes.fromhex("00001000800000aa00389b71")
_SPEAKERS = {1: 0x4, 2: 0x3}  # front centre; front left + right; others: no assignment


class TakeWriter:
    """A WAV file written in blocks under its final name, readable at every moment.

    Unlike :class:`WavWriter` (atomic: nothing appears until the commit), a take is written
    where it belongs from the first block, so that however the program stops the file holds
    what was recorded: every :data:`TAKE_SYNC_SECONDS` the writer flushes the sample data to
    the disk (``fdatasync``), then patches the RIFF and data sizes in the header and flushes
    again. After a SIGKILL or a power loss the file reads as a complete WAV file holding
    everything up to the last update.

    The header is written by livedyn, not libsndfile: ``RIFF``/``WAVE``, a 28-byte ``JUNK``
    chunk that holds the place of a ``ds64`` chunk, a WAVE_FORMAT_EXTENSIBLE ``fmt `` chunk,
    then ``data``. When the data passes :data:`WAV_DATA_LIMIT` the header becomes RF64 in
    place (``RF64`` instead of ``RIFF``, ``ds64`` instead of ``JUNK``, the 32-bit sizes set to
    0xFFFFFFFF, the real sizes in ``ds64``) [1]_; ``container="RF64"`` starts as RF64.

    Parameters
    ----------
    path : str or os.PathLike
        A new file: an existing one is refused (a take is never overwritten).
    samplerate, channels, subtype
        As for :class:`WavWriter`.
    container : {"auto", "RF64"}
    sync_seconds : float
        Time between header updates.

    Notes
    -----
    A write that fails (disk full, an I/O error) raises :class:`WavError` once; the header is
    then patched to the frames written whole, so the file stays readable, and the writer
    refuses further blocks. :attr:`error` keeps the message.

    References
    ----------
    .. [1] EBU Tech 3306, "MBWF / RF64: An extended File Format for Audio", European
       Broadcasting Union, 2009, sections 3 and 4 (the ds64 chunk, the JUNK placeholder).
    """

    HEADER = 12 + 36 + 48 + 8  # RIFF/WAVE, JUNK(28), fmt(40), data header

    def __init__(self, path, samplerate, channels, subtype="FLOAT", container="auto",
                 sync_seconds=TAKE_SYNC_SECONDS):
        import time

        self.path = Path(path)
        name = str(path)
        self._name = name
        self._fd = None
        self._clock = time.monotonic
        if isinstance(samplerate, bool) or int(samplerate) != samplerate or \
                not 0 < samplerate < 2**32:
            raise WavError(f"{name}: sample rate {samplerate!r}, expected a whole number of Hz "
                           f"above 0")
        if isinstance(channels, bool) or int(channels) != channels or \
                not 1 <= channels <= MAX_CHANNELS:
            raise WavError(f"{name}: {channels!r} channels, expected 1 to {MAX_CHANNELS}")
        subtype = str(subtype).upper()
        if subtype not in WRITE_SUBTYPES:
            raise WavError(f"{name}: sample format {subtype!r} is not supported for writing, "
                           f"expected one of {', '.join(WRITE_SUBTYPES)}")
        if container not in ("auto", "RF64"):
            raise WavError(f"{name}: container {container!r}, expected 'auto' or 'RF64'")
        self.samplerate = int(samplerate)
        self.channels = int(channels)
        self.subtype = subtype
        self.frames = 0          # frames handed to write() and stored
        self.synced_frames = 0   # frames covered by the header on disk
        self.error = None
        self.rf64 = container == "RF64"
        self.data_limit = WAV_DATA_LIMIT
        self.sync_seconds = float(sync_seconds)
        self._bits = _INT_BITS.get(subtype)
        self._frame_bytes = self.channels * BYTES_PER_SAMPLE[subtype]
        self._bytes = 0          # data bytes actually in the file
        try:
            fd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(
                os, "O_CLOEXEC", 0), 0o666)
        except FileExistsError:
            raise WavError(f"{name}: already exists; a take is never overwritten, expected a "
                           "new file name") from None
        except OSError as e:
            raise WavError(f"{name}: cannot create: {e.strerror or e}") from None
        self._fd = fd
        try:
            _write_all(fd, self._header(0))
            os.fsync(fd)
        except OSError as e:
            os.close(fd)
            self._fd = None
            try:
                os.unlink(self.path)
            except OSError:
                pass
            raise WavError(f"{name}: cannot write: {e.strerror or e}") from None
        from .presets import fsync_dir

        try:
            fsync_dir(self.path.parent)
        except OSError:
            pass
        self._last_sync = self._clock()

    # -- header ----------------------------------------------------------------------------
    def _header(self, nbytes: int) -> bytes:
        import struct

        ch, bps = self.channels, BYTES_PER_SAMPLE[self.subtype]
        tag = 3 if self.subtype == "FLOAT" else 1
        riff_size = self.HEADER - 8 + nbytes + (nbytes & 1)
        frames = nbytes // self._frame_bytes
        rf64 = self.rf64 or riff_size > 0xFFFFFFFF
        if rf64:
            head = b"RF64" + struct.pack("<I", 0xFFFFFFFF) + b"WAVE"
            chunk = b"ds64" + struct.pack("<IQQQI", 28, riff_size, nbytes, frames, 0)
            data = b"data" + struct.pack("<I", 0xFFFFFFFF)
        else:
            head = b"RIFF" + struct.pack("<I", riff_size) + b"WAVE"
            chunk = b"JUNK" + struct.pack("<I", 28) + bytes(28)
            data = b"data" + struct.pack("<I", nbytes)
        fmt = b"fmt " + struct.pack(
            "<IHHIIHHHHI", 40, 0xFFFE, ch, self.samplerate, self.samplerate * ch * bps,
            ch * bps, 8 * bps, 22, 8 * bps, _SPEAKERS.get(ch, 0)) + struct.pack(
            "<I", tag) + _GUID_TAIL
        h = head + chunk + fmt + data
        assert len(h) == self.HEADER
        return h

    def sync(self) -> None:
        """Flush the data, then bring the header's sizes up to date (and flush it)."""
        if self._fd is None:
            return
        whole = self._bytes - self._bytes % self._frame_bytes
        os.fdatasync(self._fd)
        if whole > self.data_limit:
            self.rf64 = True
        os.pwrite(self._fd, self._header(whole), 0)
        os.fdatasync(self._fd)
        self.synced_frames = whole // self._frame_bytes
        self._last_sync = self._clock()

    # -- writing ---------------------------------------------------------------------------
    def _encode(self, a):
        if self._bits is None:
            return np.ascontiguousarray(a, dtype="<f4").tobytes()
        if not np.isfinite(a).all():
            a = np.nan_to_num(a, nan=0.0, posinf=1.0, neginf=-1.0)
        full = float(2 ** (self._bits - 1))
        q = np.rint(a.astype(np.float64) * full)
        np.clip(q, -full, full - 1.0, out=q)
        q = q.astype("<i4")
        if self._bits == 16:
            return q.astype("<i2").tobytes()
        if self._bits == 32:
            return q.tobytes()
        b = q.view(np.uint8).reshape(-1, 4)[:, :3]  # little-endian: the low three bytes
        return np.ascontiguousarray(b).tobytes()

    def write(self, block) -> None:
        """Append float samples ``(frames, channels)``; the header follows within
        ``sync_seconds``. Integer files store non-finite samples as 0 / full scale."""
        if self._fd is None:
            raise WavError(f"{self._name}: writer is closed" if self.error is None
                           else self.error)
        a = np.asarray(block)
        if a.ndim == 1 and self.channels == 1:
            a = a.reshape(-1, 1)
        if a.ndim != 2 or a.shape[1] != self.channels:
            raise WavError(f"{self._name}: block of shape {a.shape}, expected (frames, "
                           f"{self.channels})")
        if a.shape[0] == 0:
            return
        data = self._encode(a)
        try:
            view = memoryview(data)
            while view:
                n = os.write(self._fd, view)
                self._bytes += n
                view = view[n:]
            self.frames += a.shape[0]
            if self._clock() - self._last_sync >= self.sync_seconds:
                self.sync()
        except OSError as e:
            self._fail(e)

    def _fail(self, e):
        self.error = (f"{self._name}: write failed ({e.strerror or e}); the take keeps "
                      f"{self._bytes // self._frame_bytes / self.samplerate:.1f} s")
        try:
            # the header space exists already: patching it needs no new block on the disk
            whole = self._bytes - self._bytes % self._frame_bytes
            os.pwrite(self._fd, self._header(whole), 0)
            self.synced_frames = whole // self._frame_bytes
            self.frames = self.synced_frames
            os.fsync(self._fd)
        except OSError:
            pass
        try:
            os.close(self._fd)
        except OSError:
            pass
        self._fd = None
        raise WavError(self.error) from None

    def close(self) -> None:
        """Patch the header for everything written (with the pad byte an odd-sized data
        chunk needs) and close. Idempotent; a failure raises :class:`WavError` once."""
        if self._fd is None:
            return
        try:
            if self._bytes % self._frame_bytes:
                # a partial frame from a short write: cut it off
                self._bytes -= self._bytes % self._frame_bytes
                os.ftruncate(self._fd, self.HEADER + self._bytes)
            if self._bytes & 1:
                os.pwrite(self._fd, b"\0", self.HEADER + self._bytes)
            self.sync()
            os.close(self._fd)
            self._fd = None
        except OSError as e:
            self._fail(e)

    abort = close  # a take is kept whatever happens

    @property
    def closed(self) -> bool:
        return self._fd is None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def __del__(self):
        try:
            if self._fd is not None:
                self.close()
        except Exception:
            pass

    def __repr__(self):
        return (f"TakeWriter({self._name!r}, {self.samplerate} Hz, {self.channels} ch, "
                f"{self.subtype}, {'RF64' if self.rf64 else 'WAV'}, {self.frames} frames)")


def _write_all(fd, data) -> None:
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view):]
