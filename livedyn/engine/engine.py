"""Engine: a Processor running live inside a PortAudio stream, and its control surface.

``Engine(...)``, ``start()``, ``set(name, value)``, ``set_many(values)``, ``snapshot()``,
``load_preset()``, ``bypass()``, ``mute()``, ``monitor()``, ``stop()`` may be called from any
thread: parameter changes go through a sequence lock that the native callback reads once per
block (a whole preset in one publication), and every other control is one aligned int64 store.
The stream owns the memory the callback touches; every way of stopping (``stop()``, a dropped
Engine, a dead server) stops and closes the stream before any of it can be freed.
"""
from __future__ import annotations

import math
import threading
import time
import weakref
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..dsp.layout import NTRACE
from ..meters import MeterSet
from ..params import GLIDE_MS, MAX_USER_LATENCY, NPARAM, OUTPUT_LEVEL, P_OUTPUT_LEVEL, ParamError
from ..processor import Processor
from . import callback as cb
from . import realtime as rt
from .stream import DeviceError, NativeStream, find_device

RING_SECONDS = 1.0
TAP_SECONDS = 2.0
RECENT_SECONDS = 5.0
ELRING = 1 << 16
SEQLOG = 4096
SWAP_XFADE_MS = 10.0  # crossfade between the old and the new version of an algorithm
PRIME_SECONDS = 1.0  # recent input the new version runs on before it is heard
GUARD_BLOCKS = 4  # blocks in a row over budget before the guard bypasses (common practice,
GUARD_XFADE_MS = 5.0  # no source: long enough to rule out one preempted block, short enough
#                       that the stream recovers within a few tens of milliseconds)


def _job_function(proc):
    """The job function the callback calls for a processor: a user file's whole kernel, or the
    built-in kernel of its kind in its precision."""
    alg = proc.algorithm
    if alg.kind == "user":
        return alg.user_job
    if proc.precision != "float64":
        from ..dsp.precision import job_for

        return job_for(alg.kind, proc.precision)
    return cb.job_limiter if alg.kind == "limiter" else cb.job_dynamics


class _Memory:
    """Everything the callback may touch (arrays, the processors of both kernel slots and their
    compiled code): owned by the stream while it is open, so nothing is freed under it."""

    def __init__(self):
        self.arrays = []
        self.slots = None  # the list of each kernel slot's processor (mutated in place)
        self.retired = None  # processors a swap let go of, kept until the next swap
        self.extra = None
        self.variants = []  # every kernel variant installed in the table (never let go)


class _Recording:
    """The open WAV writers of a run: written by the tap thread, closed by it when it ends."""

    def __init__(self):
        self.writers = None
        self.lock = threading.Lock()
        self.error = None  # one line: the first write or close that failed (disk full, ...)

    def close(self):
        """Close every writer (each one even when another fails); returns ``self.error``."""
        from ..wavio import WavError

        with self.lock:
            writers, self.writers = self.writers, None
        for w in (writers or {}).values():
            try:
                w.close()
            except (WavError, OSError) as e:
                self.error = self.error or str(e).splitlines()[0]
        return self.error


def _abandon_engine(stream, stop_evt, rec, threads):
    """Finaliser of an Engine dropped without stop(): stop and close its stream first, then let
    its helper threads end (the tap thread closes the recordings)."""
    if stream is not None:
        stream.shutdown(timeout=1.0)
    stop_evt.set()
    me = threading.current_thread()
    for t in threads:
        if t is not me:
            t.join(timeout=2.0)
    if not any(t is me for t in threads):
        rec.close()


class EngineError(RuntimeError):
    """The stream failed while running (server died, device vanished); one line."""


class ArraySource:
    """Frames of an array played as if they were an input; optionally looped."""

    def __init__(self, data, loop=False):
        self.data = np.ascontiguousarray(np.asarray(data, np.float32).reshape(len(data), -1))
        self.loop = loop
        self.pos = 0
        self.channels = self.data.shape[1]
        self.finished = False

    def read(self, n):
        if self.pos >= len(self.data):
            if not self.loop or len(self.data) == 0:
                self.finished = True
                return None
            self.pos = 0
        blk = self.data[self.pos:self.pos + n]
        self.pos += len(blk)
        return blk

    def close(self):
        pass


class FileSource:
    """A WAV file played as if it were an input, streamed from disk."""

    def __init__(self, path, loop=False, samplerate=None):
        from ..wavio import WavReader

        self.path = path
        self.reader = WavReader(path)
        if samplerate is not None and self.reader.samplerate != samplerate:
            sr = self.reader.samplerate
            self.reader.close()
            raise DeviceError(f"{path}: {sr} Hz, expected {samplerate:g} Hz like the stream")
        self.channels = self.reader.channels
        self.loop = loop
        self.finished = False

    def read(self, n):
        blk = self.reader.read(n)
        if len(blk) == 0:
            if not self.loop:
                self.finished = True
                return None
            self.reader.seek(0)
            blk = self.reader.read(n)
        return blk

    def close(self):
        self.reader.close()


def _ring(frames, width):
    hdr = np.zeros(cb.RING_HDR, np.int64)
    buf = np.zeros((max(frames, 1), max(width, 1)), np.float32)
    hdr[cb.H_BUF] = buf.ctypes.data
    hdr[cb.H_CAP] = buf.shape[0]
    hdr[cb.H_WIDTH] = buf.shape[1]
    return hdr, buf


@dataclass
class Routing:
    """Which device channels feed the processor and which carry its output (0-based)."""

    main: list
    key: list
    outputs: list  # processed channel per device output, or -1 for silence


class Engine:
    """Run ``processor`` live.

    Parameters
    ----------
    processor : Processor
        Configured processor; its arrays become the callback's (do not call its ``process``
        while the engine runs).
    blocksize : int
        Frames per callback (the JACK period when headless).
    device, input_device, output_device : str or int, optional
        PortAudio device(s) by index or name.
    main_inputs, key_inputs, outputs : list of int, optional
        1-based device channels (default: the first channels in order).
    main_source, key_source : ArraySource or FileSource, optional
        Play these as if they were the instrument / the key; otherwise device inputs.
    record_dir : path, optional
        Write main.wav, key.wav, out.wav and automation.txt there.
    ceiling_db : float
        Ceiling of the always-on last stage, dBFS.
    realtime : bool
        Ask for real time where the system allows it (default): lock the process's memory
        where the memlock limit allows and ask the host API for a real-time callback thread
        (see ``engine/realtime.py``). ``snapshot()["realtime"]`` says what was granted.
    output_level_db : float
        Output (monitor) level in dB (0 is unity, ``-inf`` silent): the last gain before the
        device outputs, gliding per sample; meters and recordings are taken before it.
        ``set("output_level", dB)`` changes it.
    """

    def __init__(self, processor: Processor, blocksize=64, device=None, input_device=None,
                 output_device=None, main_inputs=None, key_inputs=None, outputs=None,
                 main_source=None, key_source=None, record_dir=None, ceiling_db=-1.0,
                 fade_in_ms=500.0, fade_out_ms=50.0, mute_ms=5.0, max_frames=8192,
                 monitor="out", meters=True, instances=1, realtime=True,
                 output_level_db=0.0, variants=False):
        self.realtime = bool(realtime)
        self.variants = bool(variants)  # install kernel variants of the setting (see start)
        self._memory = (False, "memory not locked (real time not asked)")
        self._rt_finder = rt.ThreadFinder()
        processor.p[P_OUTPUT_LEVEL] = OUTPUT_LEVEL.check(output_level_db)
        self._settings(processor, blocksize, max_frames, main_source, key_source, record_dir)
        self._route(device, input_device, output_device, main_inputs, key_inputs, outputs)
        self._allocate(processor, ceiling_db, fade_in_ms, fade_out_ms, mute_ms)
        self._fill_user_data(processor, monitor)
        self._add_instances(processor, instances)
        self._control_state(processor, meters)
        self._warm_callback()

    # ---- construction, one concern each ------------------------------------------------------
    def _settings(self, processor, blocksize, max_frames, main_source, key_source, record_dir):
        """What the engine runs and at which size; sources checked against the processor."""
        self.proc = processor
        self.fs = processor.samplerate
        self.blocksize = int(blocksize)
        self.maxf = int(max_frames)
        if not 1 <= self.blocksize <= self.maxf:
            raise ValueError(f"blocksize {self.blocksize}: expected 1 to {self.maxf} frames "
                             "(the engine's max_frames)")
        self.ch = processor.channels
        self.kch = processor.key_channels
        self.main_source = main_source
        self.key_source = key_source
        self.record_dir = Path(record_dir) if record_dir else None
        self._lock = threading.RLock()
        self._closed = False
        self.error = None
        if main_source is not None and main_source.channels != self.ch:
            raise DeviceError(f"main source has {main_source.channels} channels, expected "
                              f"{self.ch}")
        if key_source is not None and key_source.channels != self.kch:
            raise DeviceError(f"key source has {key_source.channels} channels, expected "
                              f"{self.kch}")

    def _route(self, device, input_device, output_device, main_inputs, key_inputs, outputs):
        """Devices and channel routing, checked before anything opens."""
        main_source, key_source = self.main_source, self.key_source
        in_dev = find_device(input_device if input_device is not None else device, "input")
        out_dev = find_device(output_device if output_device is not None else device, "output")
        from .stream import list_devices

        devs = list_devices()
        n_in_dev, n_out_dev = devs[in_dev]["inputs"], devs[out_dev]["outputs"]
        main = [c - 1 for c in main_inputs] if main_inputs else list(range(self.ch))
        key = [c - 1 for c in key_inputs] if key_inputs else \
            list(range(self.ch, self.ch + self.kch))
        outs = [c - 1 for c in outputs] if outputs else list(range(min(self.ch, n_out_dev)))
        if main_source is None and len(main) != self.ch:
            raise DeviceError(f"--main-inputs gives {len(main)} channels, the processor has "
                              f"{self.ch}")
        if key_source is None and self.kch and len(key) != self.kch:
            raise DeviceError(f"--key-inputs gives {len(key)} channels, the processor has "
                              f"{self.kch} key channels")
        for what, chans, limit, src in (("main input", main, n_in_dev, main_source),
                                         ("key input", key, n_in_dev, key_source)):
            if src is not None or (what == "key input" and not self.kch):
                continue
            for c in chans:
                if not 0 <= c < limit:
                    raise DeviceError(f"{what} channel {c + 1}: {devs[in_dev]['name']!r} has "
                                      f"{limit} input channels")
        for c in outs:
            if not 0 <= c < n_out_dev:
                raise DeviceError(f"output channel {c + 1}: {devs[out_dev]['name']!r} has "
                                  f"{n_out_dev} output channels")
        used_in = [c for c in (main if main_source is None else []) +
                   (key if (key_source is None and self.kch) else [])]
        self.n_in = (max(used_in) + 1) if used_in else min(1, n_in_dev)
        self.n_out = max(outs) + 1 if outs else 1
        omap = np.full(self.n_out, -1, np.int64)
        for i, c in enumerate(outs):
            omap[c] = i % self.ch
        self.routing = Routing(main, key, list(omap))
        self.out_map = omap
        self._devices = (in_dev, out_dev)

    def _allocate(self, processor, ceiling_db, fade_in_ms, fade_out_ms, mute_ms):
        """Every array the callback touches, allocated once."""
        main_source, key_source = self.main_source, self.key_source
        main, key = self.routing.main, self.routing.key
        omap = self.out_map
        maxf = self.maxf
        self.ud = np.zeros(cb.UD_SIZE, np.int64)
        self.stats = np.zeros(cb.STATS_SIZE, np.int64)
        self.x = np.zeros((maxf, self.ch), np.float32)
        self.k = np.zeros((maxf, max(self.kch, 1)), np.float32)
        self.y = np.zeros((maxf, self.ch), np.float32)
        self.main_map = np.array(main if main_source is None else [-1] * self.ch, np.int64)
        self.key_map = np.array((key if key_source is None else [-1] * self.kch) or [-1],
                                np.int64)
        self.out_map = omap
        # the control side's values (staged privately), and the array the callback copies from,
        # written only inside the sequence lock's odd window (publish_params)
        self.pend = processor.p.copy()
        self.shared = processor.p.copy()
        self.ptmp = processor.p.copy()
        self.safe = np.zeros(cb.SAFE_SIZE, np.float64)
        self.safe[cb.F_GAIN] = 0.0
        self.safe[cb.F_TARGET] = 1.0
        self.safe[cb.F_FADE_STEP] = 1.0 / max(1.0, fade_in_ms * self.fs / 1000.0)
        self.safe[cb.F_MUTE_STEP] = 1.0 / max(1.0, mute_ms * self.fs / 1000.0)
        self.safe[cb.F_CEIL] = 10 ** (ceiling_db / 20.0)
        self.safe[cb.F_LEVEL] = 10 ** (min(processor.p[P_OUTPUT_LEVEL], 0.0) / 20.0)
        self.safe[cb.F_LEVEL_COEF] = math.exp(-1.0 / (GLIDE_MS / 1000.0 * self.fs))
        self._fade_out_step = 1.0 / max(1.0, fade_out_ms * self.fs / 1000.0)
        # the dry line delays by any latency a processor (or a later version) may have
        dry_len = max(processor.ring.shape[0], MAX_USER_LATENCY + 1) + maxf
        self.dry = np.zeros((dry_len, self.ch), np.float32)
        self.meter = np.zeros(cb.METER_SIZE, np.float64)
        self.elring = np.zeros((ELRING, 3), np.int64)
        self.seqlog = np.full((SEQLOG, 2), -1, np.int64)
        self.trace = np.zeros(NTRACE * maxf * processor.st.shape[1], np.float64)
        self.table = np.zeros((4, 2), np.int64)
        self.y2 = np.zeros((maxf, self.ch), np.float32)
        # slot 0's job lives in the user-data block, slot 1's beside it; a live swap fills the
        # slot not in use and the callback switches to it
        self.jobs = [self.ud[cb.U_JOB:cb.U_JOB + cb.JOB_SIZE], np.zeros(cb.JOB_SIZE, np.int64)]
        self._slot_owner = [processor, None]  # keeps each slot's processor (and code) alive
        self._swap_number = 0  # request numbers of live swaps (0: none pending)
        self._cancelled_at = None  # the block count when a swap was last cancelled
        self.swap_log = []  # one dict per completed swap
        rf = int(RING_SECONDS * self.fs)
        self.main_ring = _ring(rf, self.ch) if main_source is not None else None
        self.key_ring = _ring(rf, self.kch) if key_source is not None else None
        self.tap_width = 2 * self.ch + self.kch
        self.tap_ring = _ring(int(TAP_SECONDS * self.fs), self.tap_width)

    def _fill_user_data(self, processor, monitor):
        """The user-data block: the address and size of every array, the kernel slot 0 job."""
        maxf = self.maxf
        kernel = _job_function(processor)
        self._kernel_cfunc = kernel
        ud = self.ud
        ud[cb.U_STATS] = self.stats.ctypes.data
        ud[cb.U_NIN], ud[cb.U_NOUT] = self.n_in, self.n_out
        ud[cb.U_CH], ud[cb.U_KCH] = self.ch, self.kch
        ud[cb.U_X], ud[cb.U_K], ud[cb.U_Y] = (self.x.ctypes.data, self.k.ctypes.data,
                                              self.y.ctypes.data)
        ud[cb.U_MAXF] = maxf
        ud[cb.U_MAIN_MAP] = self.main_map.ctypes.data
        ud[cb.U_KEY_MAP] = self.key_map.ctypes.data
        ud[cb.U_OUT_MAP] = self.out_map.ctypes.data
        ud[cb.U_MAIN_RING] = self.main_ring[0].ctypes.data if self.main_ring else 0
        ud[cb.U_KEY_RING] = self.key_ring[0].ctypes.data if self.key_ring else 0
        ud[cb.U_TAP_RING] = self.tap_ring[0].ctypes.data
        ud[cb.U_PPEND], ud[cb.U_PTMP] = self.shared.ctypes.data, self.ptmp.ctypes.data
        ud[cb.U_KTABLE], ud[cb.U_NKSLOT] = self.table.ctypes.data, self.table.shape[0]
        ud[cb.U_KSLOT] = 0
        ud[cb.U_MONITOR] = {"out": 0, "key": 1, "delta": 2}[monitor]
        ud[cb.U_SAFE] = self.safe.ctypes.data
        ud[cb.U_DRY], ud[cb.U_DRY_LEN] = self.dry.ctypes.data, self.dry.shape[0]
        ud[cb.U_LATENCY] = processor.latency_samples
        ud[cb.U_METER] = self.meter.ctypes.data
        ud[cb.U_ELRING], ud[cb.U_RINGLEN] = self.elring.ctypes.data, ELRING
        ud[cb.U_SEQLOG], ud[cb.U_SEQLOG_LEN] = self.seqlog.ctypes.data, SEQLOG
        job = self.jobs[0]
        self._fill_job(job, processor, self.y)
        self.table[0, 0] = kernel.address
        self.table[0, 1] = job.ctypes.data
        self.table[1, 1] = self.jobs[1].ctypes.data
        ud[cb.U_Y2] = self.y2.ctypes.data
        # the overrun guard watches user-written code only
        ud[cb.U_GUARD_ON] = 1 if processor.algorithm.source is not None else 0
        ud[cb.U_GUARD_N] = GUARD_BLOCKS
        ud[cb.U_GUARD_XF] = max(1, int(round(GUARD_XFADE_MS * self.fs / 1000)))
        ud[cb.U_BUDGET_NS] = int(round(1e9 * self.blocksize / self.fs))  # of CPU time
        ud[cb.U_BLOCKSIZE] = self.blocksize

    def _add_instances(self, processor, instances):
        """Extra instances (same settings, own state, output discarded) to measure headroom."""
        maxf, ud, job, kernel = self.maxf, self.ud, self.jobs[0], self._kernel_cfunc
        self._extra = []
        self.extra_table = np.zeros((max(int(instances) - 1, 1), 2), np.int64)
        self.y_extra = np.zeros((maxf, self.ch), np.float32)
        for i in range(int(instances) - 1):
            twin = Processor(processor.algorithm, self.fs, self.ch, self.kch,
                             precision=processor.precision)
            twin.p[:] = processor.p
            ej = np.zeros(cb.JOB_SIZE, np.int64)
            ej[:] = job
            ej[cb.J_Y] = self.y_extra.ctypes.data
            ej[cb.J_P] = twin.p.ctypes.data
            ej[cb.J_ST] = twin.st.ctypes.data
            ej[cb.J_RING] = twin.ring.ctypes.data
            ej[cb.J_TRN] = 0
            self._extra.append((twin, ej))
            self.extra_table[i, 0] = kernel.address
            self.extra_table[i, 1] = ej.ctypes.data
        ud[cb.U_EXTRA] = self.extra_table.ctypes.data
        ud[cb.U_NEXTRA] = len(self._extra)
        self.stats[cb.S_PERIOD_NS] = int(round(1e9 * self.blocksize / self.fs))

    def _control_state(self, processor, meters):
        """The control side's own state: meters, recent input, change and notice logs, and
        the memory the stream will own."""
        self.meters_in = MeterSet(self.fs, self.ch) if meters else None
        self.meters_out = MeterSet(self.fs, self.ch) if meters else None
        self._snapshot_meters = {}
        self._recent = np.zeros((int(RECENT_SECONDS * self.fs), self.ch + self.kch), np.float32)
        self._recent_pos = 0
        self._recent_lock = threading.Lock()
        self._changes = []  # (seq, name, value) for the automation recording
        self._schemas = [processor.schema]  # of every version run (for the automation file)
        self._swaps_recorded = []  # (frame, Algorithm) of every swap, for the automation file
        self._first_alg = processor.algorithm
        self._notices = []  # (level, text) for the console and the status lines
        self._guard_told = False
        self._recorded = []  # (frame, name, value)
        self._threads = []
        self._stop_evt = threading.Event()
        self.stream = None
        self._rec = _Recording()
        self._recording = False  # recordings were opened (the automation is written on stop)
        self._finalizer = None
        self._installed = {}  # kernel slot -> (processor, setting) of its installed variant
        self._mem = _Memory()
        self._mem.arrays = [a for a in vars(self).values() if isinstance(a, np.ndarray)] + \
            [self.jobs, self.main_ring, self.key_ring, self.tap_ring]
        self._mem.slots = self._slot_owner
        self._mem.extra = self._extra
        self.record_error = None  # one line once a recording write failed (disk full, ...)

    @property
    def job(self):
        """The job block of the kernel slot in use."""
        return self.jobs[int(self.ud[cb.U_KSLOT])]

    def _fill_job(self, job, proc, y):
        if proc.st.shape[1] * NTRACE * self.maxf > len(self.trace):
            raise EngineError("internal: trace buffer too small for the new processor")
        job[cb.J_X], job[cb.J_K], job[cb.J_Y] = (self.x.ctypes.data,
                                                 (self.k if self.kch else self.x).ctypes.data,
                                                 y.ctypes.data)
        job[cb.J_FRAMES] = 0
        job[cb.J_CH], job[cb.J_KCH] = self.ch, self.kch if self.kch else self.ch
        p, st, ring = proc.p, proc.st, proc.ring
        job[cb.J_P], job[cb.J_PLEN] = p.ctypes.data, NPARAM
        job[cb.J_ST], job[cb.J_STR], job[cb.J_STC] = st.ctypes.data, *st.shape
        job[cb.J_RING], job[cb.J_RINGR], job[cb.J_RINGC] = ring.ctypes.data, *ring.shape
        job[cb.J_TR], job[cb.J_TRN], job[cb.J_TRC] = self.trace.ctypes.data, 0, st.shape[1]
        # a kernel variant's job calls the general one for a setting not its own
        job[cb.J_FALLBACK] = _job_function(proc).address

    # ---- life cycle ---------------------------------------------------------------------------
    def _warm_callback(self):
        """Run the callback once from here, on copies, so that nothing is first done live, and
        touch every page the callback will use."""
        import ctypes

        f = ctypes.CFUNCTYPE(ctypes.c_int, ctypes.c_void_p, ctypes.c_void_p, ctypes.c_ulong,
                             ctypes.c_void_p, ctypes.c_ulong, ctypes.c_void_p)(
            cb.native_callback.address)
        keep = [(a, a.copy()) for a in (self.stats, self.proc.st, self.proc.ring, self.proc.p,
                                        self.safe, self.meter, self.elring, self.dry,
                                        self.tap_ring[0], self.seqlog)]
        keep += [(r[0], r[0].copy()) for r in (self.main_ring, self.key_ring) if r]
        ud_keep = self.ud.copy()
        inp = np.zeros((self.blocksize, max(self.n_in, 1)), np.float32)
        out = np.zeros((self.blocksize, self.n_out), np.float32)
        f(inp.ctypes.data if self.n_in else None, out.ctypes.data, self.blocksize, None, 0,
          self.ud.ctypes.data)
        for a, c in keep:
            a[...] = c
        self.ud[...] = ud_keep
        for a in (self.x, self.k, self.y, self.dry, self.trace, self.tap_ring[1], self.elring,
                  self.seqlog) + tuple(r[1] for r in (self.main_ring, self.key_ring) if r):
            a.reshape(-1)[::512] = a.reshape(-1)[::512]

    def start(self):
        """Prefill the input rings, open and start the stream, start the helper threads."""
        self._record_initial()
        for src, ring in ((self.main_source, self.main_ring), (self.key_source, self.key_ring)):
            if src is not None:
                self._feed(src, ring, until_full=True)
        if self.realtime:
            self._memory = rt.lock_memory()
        rt.prefault(self._callback_arrays())  # no callback runs yet: nothing can change
        # open (and so check rate and channels) before any recording file is created
        self.stream = NativeStream(cb.native_callback.address, self.ud.ctypes.data,
                                   self._devices[0], self._devices[1], self.n_in, self.n_out,
                                   self.fs, self.blocksize, realtime=self.realtime, keep=self._mem)
        # an Engine dropped without stop(): its stream is stopped and closed before its arrays
        # can go (the helper threads hold the Engine only weakly)
        self._finalizer = weakref.finalize(self, _abandon_engine, self.stream, self._stop_evt,
                                           self._rec, self._threads)
        if self.record_dir is not None:
            self._open_writers()
        self.t_start = time.monotonic()
        self.stream.start()
        self._rt_finder.begin(self.stats[cb.S_BLOCKS])
        me = weakref.ref(self)
        if self.variants:  # not joined at stop: it never holds the engine while it compiles
            threading.Thread(target=_variant_loop, args=(me, self._stop_evt), daemon=True,
                             name="livedyn-variant-loop").start()
        loops = [(_feeder_loop, (me, self._stop_evt)),
                 (_tap_loop, (me, self._stop_evt, self._rec))]
        for target, args in loops:
            t = threading.Thread(target=target, args=args, daemon=True,
                                 name=f"livedyn-{target.__name__.strip('_')}")
            t.start()
            self._threads.append(t)
        return self

    def _feed(self, src, ring, until_full=False):
        hdr, buf = ring
        chunk = max(self.blocksize * 8, 1024)
        moved = 0
        while True:
            free = hdr[cb.H_CAP] - cb.ring_fill(hdr)
            if free < chunk:
                return moved
            blk = src.read(chunk)
            if blk is None or len(blk) == 0:
                return moved if moved else -1
            cb.ring_write(hdr, np.ascontiguousarray(blk, np.float32), len(blk))
            moved += len(blk)
            if not until_full and moved >= chunk * 4:
                return moved

    def _feed_sources(self, ended):
        for src, ring in ((self.main_source, self.main_ring), (self.key_source, self.key_ring)):
            if src is not None and not ended.get(id(src)):
                if self._feed(src, ring) == -1:
                    ended[id(src)] = True

    @property
    def source_finished(self):
        """True once a file/array main source has played to its end and its ring is empty."""
        if self.main_source is None:
            return False
        return self.main_source.finished and cb.ring_fill(self.main_ring[0]) == 0

    def _drain_tap(self, hdr, chunk):
        while True:
            n = cb.ring_take(hdr, chunk)
            if n == 0:
                return
            blk = chunk[:n]
            self._remember(blk[:, :self.ch + self.kch])
            xin = np.ascontiguousarray(blk[:, :self.ch])
            key = np.ascontiguousarray(blk[:, self.ch:self.ch + self.kch])
            yout = np.ascontiguousarray(blk[:, self.ch + self.kch:])
            if self.meters_in is not None:
                self.meters_in.process(xin)
                self.meters_out.process(yout)
                self._snapshot_meters = {"in": self.meters_in.snapshot(),
                                         "out": self.meters_out.snapshot()}
            writers = self._rec.writers
            if writers is not None and self.record_error is None:
                self._record(writers, xin, key, yout)

    def _record(self, writers, xin, key, yout):
        """Append to the take; a failed write (disk full, ...) ends the recording, keeps what
        was written readable and posts one line, while the stream plays on."""
        from ..wavio import WavError

        try:
            writers["main"].write(xin)
            if self.kch:
                writers["key"].write(key)
            writers["out"].write(yout)
        except (WavError, OSError) as e:
            self._rec.error = self._rec.error or str(e).splitlines()[0]
            self.record_error = f"recording stopped: {self._rec.error}"
            self._rec.close()
            self.notice("error", self.record_error)

    def _remember(self, blk):
        buf = self._recent
        cap = len(buf)
        blk = blk[-cap:]
        n = len(blk)
        with self._recent_lock:
            i = self._recent_pos % cap
            first = min(n, cap - i)
            buf[i:i + first] = blk[:first]
            buf[:n - first] = blk[first:]
            self._recent_pos += n

    def recent_input(self, seconds):
        """The last ``seconds`` (at most RECENT_SECONDS) of main and key input, as
        ``(main, key or None)`` float32 arrays: for level-matched comparisons."""
        with self._recent_lock:
            cap = len(self._recent)
            n = int(min(self._recent_pos, cap, round(seconds * self.fs)))
            end = self._recent_pos % cap
            data = self._recent[np.arange(end - n, end) % cap]
        return data[:, :self.ch], (data[:, self.ch:] if self.kch else None)

    def _open_writers(self):
        # takes are written under their final names, readable whatever stops the run
        from ..wavio import TakeWriter

        self.record_dir.mkdir(parents=True, exist_ok=True)
        fs = int(self.fs)
        writers = {}
        try:
            for name, width in (("main", self.ch), ("key", self.kch), ("out", self.ch)):
                if width:
                    writers[name] = TakeWriter(self.record_dir / f"{name}.wav", fs, width)
        except BaseException:
            for w in writers.values():
                w.close()
            raise
        self._rec.writers = writers
        self._recording = True

    def stop(self, timeout=2.0, stream_timeout=None):
        """Fade out, stop and close the stream, end the helper threads, close the recordings
        and write the automation. Idempotent.

        The stream is always stopped and closed before anything it touches is let go; after a
        dead server or device, whose stop never returns, the stream is abandoned with its
        memory (see :meth:`NativeStream.shutdown`) and the rest proceeds. ``stream_timeout``:
        how long to wait for PortAudio's stop (default 5 s, 0.5 s once ``error`` is set; 0 when
        the caller knows that the server is gone)."""
        with self._lock:
            if self._closed:
                return
            self._closed = True
        if self.stream is not None:
            if self.error is None:
                self.safe[cb.F_FADE_STEP] = self._fade_out_step
                self.safe[cb.F_TARGET] = 0.0
                t_end = time.monotonic() + timeout
                while self.safe[cb.F_GAIN] > 0.0 and time.monotonic() < t_end and self.alive():
                    time.sleep(0.005)
                time.sleep(2 * self.blocksize / self.fs)
            if stream_timeout is None:
                stream_timeout = 5.0 if self.error is None else 0.5
            self.stream.shutdown(timeout=stream_timeout)
        # no block runs any more (or ever will): the tap thread drains what is left, closes
        # the recordings and ends
        self._stop_evt.set()
        for t in self._threads:
            t.join(timeout=max(timeout, 5.0))
        for src in (self.main_source, self.key_source):
            if src is not None:
                src.close()
        if not any(t.is_alive() for t in self._threads):
            self._rec.close()
        if self._rec.error and self.record_error is None:
            self.record_error = f"recording stopped: {self._rec.error}"
        if self._recording:
            try:
                self._write_automation()
            except (OSError, ValueError) as e:  # disk full: the audio is kept, say what is not
                self.record_error = self.record_error or (
                    f"recording: automation not written ({str(e).splitlines()[0]})")
        if self._finalizer is not None:
            self._finalizer.detach()

    def alive(self):
        """False when the stream has stopped delivering blocks (a dead server, say)."""
        return self.error is None

    def watch(self, stall_seconds=0.5):
        """Call regularly: detects a stalled stream from the frame counter; sets .error."""
        if self.stream is None or self.error is not None:
            return self.error is None
        now = time.monotonic()
        frames = int(self.stats[cb.S_FRAMES])
        last = getattr(self, "_watch_last", None)
        if last is None or frames != last[0]:
            self._watch_last = (frames, now)
        elif now - last[1] > stall_seconds and now - self.t_start > 1.0:
            self.error = (f"the audio stream stopped: no block for {now - last[1]:.1f} s "
                          "(the server or device went away)")
            return False
        return True

    # ---- control surface ----------------------------------------------------------------------
    def set(self, name, value):
        """Set a parameter; it reaches the callback at its next block. Returns the sequence."""
        return self.set_many({name: value})

    def set_many(self, values):
        """Set several parameters at once (a whole preset, say): the callback takes all of them
        at the same block, or none. Nothing changes when one value is refused. Returns the
        sequence number of the publication."""
        with self._lock:
            trial = self.pend.copy()
            parsed = []
            values = dict(values)
            if OUTPUT_LEVEL.name in values:  # the engine's own, not the algorithm's
                trial[P_OUTPUT_LEVEL] = OUTPUT_LEVEL.parse(values.pop(OUTPUT_LEVEL.name))
            if values:
                trial, parsed = self.proc.validate_many(values, trial)
            self.pend[:] = trial  # the private stage; the callback never reads it
            seq = int(cb.publish_params(self.ud, self.pend))
            for prm, v in parsed:
                self._changes.append((seq, prm.name, v))
            if any(prm.name in ("lookahead", "true_peak") for prm, _ in parsed):
                self.ud[cb.U_LATENCY] = self.proc.latency_for(self.pend)  # reads pend only
            return seq

    def get(self, name):
        if name == OUTPUT_LEVEL.name:
            return float(self.pend[P_OUTPUT_LEVEL])
        return float(self.pend[self.proc.schema[name].slot])

    def wait_applied(self, seq, timeout=1.0):
        """Wait until the callback echoes a parameter sequence >= seq; returns its frame."""
        t_end = time.monotonic() + timeout
        while time.monotonic() < t_end:
            if self.stats[cb.S_PARAM_SEQ] >= seq:
                return int(self.stats[cb.S_PARAM_FRAME])
            time.sleep(0.0005)
        return None

    def load_preset(self, name_or_path):
        """Apply a preset of the running algorithm; a broken preset changes nothing."""
        from .. import presets

        pr = presets.load(name_or_path)
        src = self.proc.algorithm.source
        if pr.algorithm_file is not None or src is not None:
            if pr.algorithm_file is None or src is None or \
                    Path(pr.algorithm_file).resolve() != Path(src).resolve():
                raise ParamError(f"{name_or_path}: a preset of "
                                 f"{pr.algorithm_file or pr.algorithm}, but this engine runs "
                                 f"{src or self.proc.algorithm.name}")
        elif pr.algorithm != self.proc.algorithm.name:
            raise ParamError(f"{name_or_path}: a {pr.algorithm} preset, but this engine runs "
                             f"the {self.proc.algorithm.name}")
        for n, v in pr.values.items():
            self.proc.schema[n].check(v)
        self.set_many(pr.values)  # one publication: the callback never hears half a preset
        return pr

    # ---- live swap ----------------------------------------------------------------------------
    def swap(self, algorithm, xfade_ms=SWAP_XFADE_MS, prime_seconds=PRIME_SECONDS,
             stall_seconds=0.5, precision=None):
        """Replace the running algorithm with ``algorithm`` (an Algorithm, e.g. a new version
        of a user file) without a dropout.

        Off the audio thread: a new Processor takes the values of the parameters both versions
        share (the others start at their defaults) and runs on the most recent input, so that
        its detector and gain are where the old one's are. Then the callback runs both
        versions: first until the new one's delay line holds live input, then a crossfade of
        ``xfade_ms``, after which the new one is current and the callback echoes the switch. The
        old version's code and state stay alive until that echo. Returns a dict of what
        happened; raises EngineError when the stream stops (no block for ``stall_seconds``)
        before the callback confirms the switch.

        ``precision`` ("float64" or "float32", default the running one's) is the arithmetic of
        the new version: a change of precision is a swap like any other, its variant compiled
        here, off the audio thread, before the callback sees it."""
        from .. import loader
        from ..dsp.precision import check as check_precision

        precision = check_precision(precision if precision is not None else self.proc.precision)
        alg = loader.get(algorithm, precision)
        with self._lock:
            if self.stream is None or self.error is not None:
                raise EngineError("swap: the stream is not running")
            if int(self.ud[cb.U_SWAP_REQ]) != 0:
                raise EngineError("swap: the previous swap has not finished")
            if self._cancelled_at is not None and \
                    int(self.stats[cb.S_BLOCKS]) < self._cancelled_at + 2:
                # a block that began before the cancellation may still run the incoming slot
                raise EngineError("swap: the stream has not run since the last swap was "
                                  "cancelled; try again when it plays")
            t0 = time.monotonic()
            old = self.proc
            new = Processor(alg, self.fs, self.ch, self.kch, precision=precision)
            carried = []
            for prm in new.schema:
                if prm.name in old.schema:
                    try:
                        new.set(prm.name, float(self.pend[old.schema[prm.name].slot]))
                        carried.append(prm.name)
                    except ParamError:
                        pass  # out of the new range: the new default stands
            new.p[P_OUTPUT_LEVEL] = self.pend[P_OUTPUT_LEVEL]  # the output level carries on
            main, key = self.recent_input(prime_seconds)
            if len(main):
                blk = 1024
                for i in range(0, len(main), blk):
                    new.process(main[i:i + blk], key[i:i + blk] if key is not None else None)
            t_prime = time.monotonic() - t0
            rt.prefault((new.p, new.st, new.ring))  # not yet seen by the callback
            cur = int(self.ud[cb.U_KSLOT])
            nxt = 1 - cur
            job = self.jobs[nxt]
            self._fill_job(job, new, self.y2)
            self._slot_owner[nxt] = new
            self.table[nxt, 0] = _job_function(new).address  # (its job address is fixed)
            lat = new.latency_samples
            self.ud[cb.U_SWAP_SLOT] = nxt
            self.ud[cb.U_SWAP_WARM] = lat + self.blocksize if lat > 0 else 0
            self.ud[cb.U_SWAP_XF] = max(1, int(round(xfade_ms * self.fs / 1000)))
            self.ud[cb.U_SWAP_POS] = 0
            self.ud[cb.U_SWAP_LAT] = lat
            blocks0 = int(self.stats[cb.S_SWAP_BLOCKS])
            self._swap_number += 1
            req = self._swap_number
            cb.publish_swap(self.ud, req)
            # The callback completes the swap with a compare-and-swap of U_SWAP_REQ to 0; a
            # stalled stream makes this side withdraw the request with its own. One of the two
            # wins, so the engine and the callback never describe different versions.
            frames, t_frames = int(self.stats[cb.S_FRAMES]), time.monotonic()
            t_won = None  # when the callback was seen to have won the race to complete
            while int(self.ud[cb.U_SWAP_DONE]) != req:
                now = time.monotonic()
                f = int(self.stats[cb.S_FRAMES])
                if f != frames:
                    frames, t_frames = f, now
                elif t_won is not None:
                    if now - t_won > 1.0:  # completed, and the echo a few stores away
                        break
                elif now - t_frames > stall_seconds or not self.alive():
                    if cb.cancel_swap(self.ud, req):
                        # withdrawn: the callback never completes it. A block running now may
                        # still read the incoming slot, so both processors stay alive
                        self._mem.retired = (old, new)
                        self._slot_owner[nxt] = new
                        self._cancelled_at = int(self.stats[cb.S_BLOCKS])
                        raise EngineError(f"swap: the stream stopped (no block for "
                                          f"{now - t_frames:.1f} s) before the switch; the "
                                          "swap is cancelled and the running version stays")
                    t_won = now
                time.sleep(0.001)
            # the callback now runs the new version only: the old one may go after this
            self.pend[:] = new.p
            self._mem.retired = old
            self._slot_owner[cur] = None
            self.ud[cb.U_GUARD_ON] = 1 if alg.source is not None else 0
            self._schemas.append(new.schema)
            frame = int(self.stats[cb.S_SWAP_FRAME])
            self._swaps_recorded.append((frame, alg))
            for prm in new.schema:  # the values in force from the switch on
                self._recorded.append((frame, prm.name, float(new.p[prm.slot])))
            self.proc = new  # last: readers of proc find pend already the new version's
            info = {"algorithm": alg.name, "frame": frame, "precision": new.precision,
                    "prime_s": t_prime, "switch_s": time.monotonic() - t0 - t_prime,
                    "carried": carried, "latency": lat,
                    "swap_blocks": int(self.stats[cb.S_SWAP_BLOCKS]) - blocks0}
            self.swap_log.append(info)
            return info

    def notice(self, level, text):
        """Post a one-line message ("info", "warn" or "error") for whoever shows the run."""
        with self._lock:
            self._notices.append((level, str(text)))

    def take_notices(self):
        """Messages posted since the last call, oldest first; the overrun guard's among them."""
        g = self.guard_tripped()
        if g and not self._guard_told:
            self._guard_told = True
            self.notice("error", g)
        elif not g:
            self._guard_told = False
        with self._lock:
            out, self._notices = self._notices, []
        return out

    def guard_tripped(self):
        """None, or one line saying that the overrun guard has bypassed the algorithm."""
        state = int(self.ud[cb.U_GUARD_STATE])
        if state == cb.GUARD_OK:
            return None
        el = self.stats[cb.S_GUARD_EL] / max(1, self.stats[cb.S_PERIOD_NS])
        return (f"{self.proc.algorithm.name} overran the block budget for {GUARD_BLOCKS} blocks "
                f"in a row (last {el:.1f} periods): bypassed, the stream goes on; load a new "
                "version or call reset_guard()")

    def reset_guard(self):
        """Run the algorithm again after the overrun guard bypassed it: a fresh instance,
        primed on the recent input, crossfaded in from the dry signal (as a swap)."""
        if int(self.ud[cb.U_GUARD_STATE]) == cb.GUARD_OK:
            return None
        return self.swap(self.proc.algorithm)

    def bypass(self, on=True):
        self.ud[cb.U_BYPASS] = 1 if on else 0

    def mute(self, on=True):
        self.ud[cb.U_MUTE] = 1 if on else 0

    def monitor(self, mode):
        modes = {"out": cb.MONITOR_OUT, "key": cb.MONITOR_KEY, "delta": cb.MONITOR_DELTA}
        if mode not in modes:
            raise ParamError(f"monitor {mode!r}: expected one of out, key, delta")
        self.ud[cb.U_MONITOR] = modes[mode]

    def set_canary(self, every_blocks, spin_ns):
        """Test-only: make every Nth block overrun by spinning (0 switches it off)."""
        self.ud[cb.U_CANARY_NS] = int(spin_ns)
        self.ud[cb.U_CANARY_EVERY] = int(every_blocks)

    # ---- kernel variants -----------------------------------------------------------------------
    def kernel_info(self):
        """Which kernel the running slot calls: ``{"precision", "variant"}``, ``variant`` the
        structural setting (livedyn.dsp.variants) of the installed variant, or None for the
        general kernel."""
        slot = int(self.ud[cb.U_KSLOT])
        inst = self._installed.get(slot)
        proc = self.proc
        v = inst[1] if inst is not None and inst[0] is proc else None
        return {"precision": proc.precision, "variant": v}

    def install_variant(self):
        """Compile (or load) the kernel variant of the running setting and install it in the
        running slot's table entry; returns its setting, or None when there is none to
        install. Off the audio thread (a variant's first compilation takes seconds; the
        general kernel runs meanwhile). Changes of setting need no care: a variant's job runs
        the general kernel for any other setting (livedyn.dsp.variants)."""
        from ..dsp.variants import job_variant

        want = self._variant_wanted()
        if want is None:
            return self.kernel_info()["variant"]
        proc, slot, modes = want
        return self._install(proc, slot, modes, job_variant(modes, proc.precision))

    def _variant_wanted(self):
        """(processor, slot, setting) of a variant to install, or None when there is none to
        install (no variants for this kind, or the right one is in)."""
        from ..dsp.dynamics import dynamics_modes
        from ..dsp.variants import ready

        proc = self.proc
        if proc.algorithm.kind != "dynamics" or self.stream is None or self._closed:
            return None
        slot = int(self.ud[cb.U_KSLOT])
        modes = int(dynamics_modes(self.pend))  # what the callback runs (a torn read of a
        #                                         change being written only picks another one)
        inst = self._installed.get(slot)
        if inst is not None and inst[0] is proc and inst[1] == modes:
            return None
        if not ready(modes, proc.precision):
            self.notice("info", "compiling a kernel for this setting (once; cached "
                                "afterwards); the general kernel plays meanwhile")
        return proc, slot, modes

    def _install(self, proc, slot, modes, job):
        with self._lock:
            if (self.proc is not proc or int(self.ud[cb.U_SWAP_REQ]) != 0
                    or int(self.ud[cb.U_KSLOT]) != slot or self._closed):
                return None  # a swap came between: the next round looks again
            self._mem.variants.append(job)
            addr = job.address
            self.table[slot, 0] = addr
            for i in range(len(self._extra)):
                self.extra_table[i, 0] = addr
            self._installed[slot] = (proc, modes)
        self.notice("info", "the kernel compiled for this setting is in use")
        return modes

    # ---- what the callback reports ------------------------------------------------------------
    def snapshot(self):
        """Meters and statistics as plain numbers."""
        s = self.stats
        blocks = int(s[cb.S_BLOCKS])
        n = min(blocks, ELRING)
        period_ns = float(s[cb.S_PERIOD_NS])
        el = self.elring[:n, 0].astype(np.float64)
        iv = self.elring[:n, 1].astype(np.float64)
        iv = iv[iv > 0]

        def pct(a, q):
            return float(np.percentile(a, q)) / period_ns if len(a) else 0.0

        m = self.meter
        snap = {
            "blocks": blocks, "frames": int(s[cb.S_FRAMES]),
            "late_blocks": int(s[cb.S_LATE]), "flagged_blocks": int(s[cb.S_FLAGGED]),
            "status_flags": int(s[cb.S_FLAGS_OR]),
            "callback_load": {"median": pct(el, 50), "p99": pct(el, 99), "p99_9": pct(el, 99.9),
                              "max": float(el.max()) / period_ns if n else 0.0},
            "wakeup_interval": {"median": pct(iv, 50), "p99": pct(iv, 99),
                                "p99_9": pct(iv, 99.9),
                                "max": float(iv.max()) / period_ns if len(iv) else 0.0},
            "underruns_main": int(s[cb.S_UNDER_MAIN]), "underruns_key": int(s[cb.S_UNDER_KEY]),
            "tap_dropped_blocks": int(s[cb.S_TAP_DROPPED]),
            "nonfinite_blocks": int(s[cb.S_NONFINITE_BLOCKS]),
            "oversized_callbacks": int(s[cb.S_TOO_BIG]),
            "host_period_frames": int(s[cb.S_HOST_FRAMES]) or None,
            # the callback's own CPU time, read only while the overrun guard is on
            "callback_cpu_max": float(s[cb.S_CPU_MAX]) / period_ns if s[cb.S_CPU_MAX] else None,
            "param_seq": int(s[cb.S_PARAM_SEQ]), "param_frame": int(s[cb.S_PARAM_FRAME]),
            "peak_in_dbfs": [_db(v) for v in m[cb.M_IN:cb.M_IN + self.ch]],
            "peak_out_dbfs": [_db(v) for v in m[cb.M_OUT:cb.M_OUT + self.ch]],
            "peak_key_dbfs": [_db(v) for v in m[cb.M_KEY:cb.M_KEY + self.kch]],
            "gain_reduction_db": float(m[cb.M_GR]),
            "lookahead_samples": int(self.ud[cb.U_LATENCY]),
            "samplerate": self.fs, "blocksize": self.blocksize,
            "muted": bool(self.ud[cb.U_MUTE]), "bypassed": bool(self.ud[cb.U_BYPASS]),
            "monitor": ("out", "key", "delta")[int(self.ud[cb.U_MONITOR])],
            "kernel": self.kernel_info(),
        }
        if self.stream is not None:
            snap["stream_latency_s"] = {"input": self.stream.input_latency,
                                        "output": self.stream.output_latency}
        snap["realtime_threads"] = realtime_threads()
        snap["realtime"] = self.realtime_info()
        snap["meters"] = self._snapshot_meters
        return snap

    def _callback_arrays(self):
        """Every array the callback may touch (the running and the spare slot's, the extra
        instances', the rings'), for :func:`realtime.prefault`."""
        arrays = [self.ud, self.stats, self.x, self.k, self.y, self.y2, self.y_extra,
                  self.main_map, self.key_map, self.out_map, self.pend, self.ptmp, self.safe,
                  self.dry, self.meter, self.elring, self.seqlog, self.trace, self.table,
                  self.jobs[1], self.extra_table, self.proc.p, self.proc.st, self.proc.ring]
        for r in (self.main_ring, self.key_ring, self.tap_ring):
            if r is not None:
                arrays += list(r)
        for twin, ej in self._extra:
            arrays += [twin.p, twin.st, twin.ring, ej]
        return arrays

    def realtime_info(self):
        """What real time was granted: the callback thread's scheduling policy and priority
        (found from outside the callback, see ``realtime.ThreadFinder``; "unknown" until about
        20 blocks have run), whether memory is locked, the host API and what was asked of it."""
        tid = self._rt_finder.find(self.stats[cb.S_BLOCKS]) if self.stream is not None else None
        policy, prio = rt.thread_policy(tid) if tid is not None else ("unknown", 0)
        locked, note = self._memory
        s = self.stream
        return {"requested": self.realtime, "granted": policy in rt.REALTIME_POLICIES,
                "policy": policy, "priority": prio, "thread": tid,
                "memory_locked": bool(locked and rt.memory_locked() > 0), "memory": note,
                "host_api": s.host_api if s is not None else None,
                "host_request": s.host_realtime if s is not None else None}

    def wait_realtime(self, timeout=1.0):
        """:meth:`realtime_info` once the callback's thread is identified (or after
        ``timeout`` seconds)."""
        t_end = time.monotonic() + timeout
        while time.monotonic() < t_end and self.stream is not None:
            info = self.realtime_info()
            if info["thread"] is not None:
                return info
            time.sleep(0.02)
        return self.realtime_info()

    # ---- recording of parameter changes -------------------------------------------------------
    def _record_initial(self):
        self._recorded = [(0, prm.name, float(self.proc.p[prm.slot])) for prm in self.proc.schema]

    def _resolve_changes(self):
        """Give each parameter change the frame at which the callback applied it."""
        if not self._changes:
            return
        applied = int(self.stats[cb.S_PARAM_SEQ])
        log = self.seqlog
        keep = []
        with self._lock:
            changes, self._changes = self._changes, []
        for seq, name, v in changes:
            if seq > applied:
                keep.append((seq, name, v))
                continue
            ok = log[:, 0] >= seq
            frame = int(log[ok, 1][np.argmin(log[ok, 0])]) if ok.any() else \
                int(self.stats[cb.S_PARAM_FRAME])
            self._recorded.append((frame, name, v))
        with self._lock:
            self._changes = keep + self._changes

    def _write_automation(self):
        from ..automation import Automation

        # after a swap, versions may give one name different ranges or names: the file then
        # holds plain numbers (each was checked by the version that ran when it was set)
        auto = Automation(self.fs, schema=None if self._swaps_recorded else self.proc.schema)
        for frame, name, v in sorted(self._recorded, key=lambda e: e[0]):
            auto.add(frame, name, v)
        auto.save(self.record_dir / "automation.txt")
        if self._swaps_recorded:  # which version ran from which frame
            lines = [f"{f} {a.source or a.name} {a.digest}".rstrip()
                     for f, a in [(0, self._first_alg)] + self._swaps_recorded]
            from ..files import write_text_atomic

            write_text_atomic(self.record_dir / "versions.txt",
                              "# FRAME ALGORITHM (file or name) CONTENT HASH\n"
                              + "\n".join(lines) + "\n")


def _feeder_loop(engine_ref, stop_evt):
    """Keep the file/array sources' rings full; holds the Engine only weakly."""
    ended = {}
    while not stop_evt.is_set():
        eng = engine_ref()
        if eng is None:
            return
        eng._feed_sources(ended)
        del eng
        stop_evt.wait(0.01)


def _variant_loop(engine_ref, stop_evt):
    """Keep the kernel variant of the running setting installed (see Engine.install_variant);
    holds the Engine only weakly, and not at all while a variant compiles, so that stopping
    never waits for a compilation. A variant that cannot be built leaves the general kernel
    and says so once."""
    from ..dsp.variants import job_variant

    while not stop_evt.is_set():
        eng = engine_ref()
        if eng is None:
            return
        want = eng._variant_wanted()
        del eng
        if want is not None:
            proc, slot, modes = want
            try:
                job = job_variant(modes, proc.precision)
            except Exception as e:  # noqa: BLE001 - the general kernel plays on
                eng = engine_ref()
                if eng is not None:
                    why = str(e).splitlines()[0] if str(e) else type(e).__name__
                    eng.notice("warn", f"kernel variant not used: {why}; the general "
                                       "kernel plays")
                return
            eng = engine_ref()
            if eng is None or stop_evt.is_set():
                return
            eng._install(proc, slot, modes, job)
            del eng, proc
        stop_evt.wait(0.25)


def _tap_loop(engine_ref, stop_evt, rec):
    """Drain the tap ring into the meters and the recordings until stopped, then once more
    (the stream is closed by then, so nothing is left behind); closes the recordings."""
    chunk = None
    try:
        while True:
            eng = engine_ref()
            if eng is None:
                return
            if chunk is None:
                chunk = np.zeros((int(0.1 * eng.fs) + eng.maxf, eng.tap_width), np.float32)
            last = stop_evt.is_set()
            eng._drain_tap(eng.tap_ring[0], chunk)
            eng._resolve_changes()
            del eng
            if last:
                return
            stop_evt.wait(0.02)
    finally:
        rec.close()


def realtime_threads():
    """Threads of this process running with a real-time policy (SCHED_FIFO/RR), read from
    /proc: the audio callback's thread is among them when real-time scheduling was granted."""
    import os

    n = 0
    try:
        for tid in os.listdir("/proc/self/task"):
            with open(f"/proc/self/task/{tid}/stat") as f:
                fields = f.read().rsplit(")", 1)[1].split()
            if int(fields[38]) in (1, 2):  # field 41 of stat: policy
                n += 1
    except (OSError, IndexError, ValueError):
        return -1
    return n


def _db(v):
    return 20 * math.log10(v) if v > 1e-10 else -200.0
