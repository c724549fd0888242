"""Real-time scheduling and locked memory for the live stream, and a report of what was granted.

Nothing here runs on the audio thread. The pieces:

- :func:`lock_memory`: ``mlockall(MCL_CURRENT | MCL_FUTURE)`` where the memlock limit allows it
  (Linux), so that no page the callback needs can be swapped out or first faulted in live;
  otherwise a one-line reason.
- :func:`prefault`: write every page of the arrays the callback touches, before it starts.
- :func:`host_stream_info` and :func:`enable_host_realtime`: what PortAudio offers per host API.
  ALSA starts its callback thread with a real-time policy only after
  ``PaAlsa_EnableRealtimeScheduling(stream, 1)`` (``pa_linux_alsa.h``); WASAPI raises its thread
  when ``paWinWasapiThreadPriority`` asks for ``eThreadPriorityProAudio``
  (``pa_win_wasapi.h``); a JACK client's process thread gets the policy of the server
  (``jackd -R``); Core Audio's I/O thread is scheduled by the system.
- :class:`ThreadFinder`: which thread of the process runs the callback, found without
  anything in the callback itself: the thread whose context switches grew like the block
  count over the same interval (the callback's thread wakes once per block).

References
----------
mlockall(2), getrlimit(2), sched_getscheduler(2), proc(5) (``/proc/PID/task/TID/status``);
PortAudio's ``pa_linux_alsa.h`` and ``pa_win_wasapi.h``.
"""
from __future__ import annotations

import os
import sys
import threading

MCL_CURRENT, MCL_FUTURE = 1, 2  # Linux <sys/mman.h> (x86, arm and most others)
CAP_IPC_LOCK, CAP_SYS_NICE = 14, 23  # Linux <linux/capability.h>
POLICY_NAMES = {0: "SCHED_OTHER", 1: "SCHED_FIFO", 2: "SCHED_RR", 3: "SCHED_BATCH",
                5: "SCHED_IDLE", 6: "SCHED_DEADLINE"}
REALTIME_POLICIES = ("SCHED_FIFO", "SCHED_RR", "SCHED_DEADLINE")
HOW_TO = "run 'livedyn ready' for this machine's limits and how to raise them"

_LOCK_STATE = {"locked": False, "note": "memory not locked (not asked)"}


def has_capability(bit):
    """True if this process holds the Linux capability ``bit`` (``CapEff`` in
    /proc/self/status); False elsewhere or when unreadable."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("CapEff:"):
                    return bool(int(line.split()[1], 16) >> bit & 1)
    except (OSError, ValueError, IndexError):
        pass
    return False


def mapped_bytes():
    """Bytes this process maps (``VmSize``), or 0 when unknown."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmSize:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return 0


def _mib(n):
    return f"{n / 2**20:.0f} MiB"


def lock_decision(limit, mapped, capable):
    """Whether to call mlockall given the soft memlock ``limit`` (bytes, or
    ``resource.RLIM_INFINITY``), the bytes ``mapped`` now and whether CAP_IPC_LOCK is held.

    Returns ``(lock, reason)``. With a finite limit MCL_FUTURE makes every later allocation
    fail once the limit is reached, so a finite limit must leave room: at least twice what is
    mapped now (common practice, no source).
    """
    import resource

    if capable:
        return True, "CAP_IPC_LOCK"
    if limit == resource.RLIM_INFINITY:
        return True, "memlock unlimited"
    if mapped and limit >= 2 * mapped:
        return True, f"memlock {_mib(limit)}"
    return False, (f"memory not locked: the memlock limit is {_mib(limit)}, livedyn maps "
                   f"{_mib(mapped)}; {HOW_TO}")


def lock_memory():
    """Lock the process's memory once (``mlockall(MCL_CURRENT | MCL_FUTURE)``), where allowed.

    Returns ``(locked, note)``: ``note`` is one line ("memory locked (memlock unlimited)" or why
    not). Idempotent: a second call reports the first outcome.
    """
    if _LOCK_STATE["locked"]:
        return True, _LOCK_STATE["note"]
    if not sys.platform.startswith("linux"):
        _LOCK_STATE["note"] = f"memory not locked: not done on {sys.platform}"
        return False, _LOCK_STATE["note"]
    import ctypes
    import resource

    limit = resource.getrlimit(resource.RLIMIT_MEMLOCK)[0]
    ok, why = lock_decision(limit, mapped_bytes(), has_capability(CAP_IPC_LOCK))
    if not ok:
        _LOCK_STATE["note"] = why
        return False, why
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        rc = libc.mlockall(ctypes.c_int(MCL_CURRENT | MCL_FUTURE))
    except (OSError, AttributeError) as e:
        _LOCK_STATE["note"] = f"memory not locked: mlockall unavailable ({e})"
        return False, _LOCK_STATE["note"]
    if rc != 0:
        err = ctypes.get_errno()
        _LOCK_STATE["note"] = f"memory not locked: mlockall failed ({os.strerror(err)}); {HOW_TO}"
        return False, _LOCK_STATE["note"]
    _LOCK_STATE.update(locked=True, note=f"memory locked ({why})")
    return True, _LOCK_STATE["note"]


def memory_locked():
    """Bytes of this process that are locked now (``VmLck``), 0 if none or unknown."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmLck:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return 0


def prefault(arrays):
    """Write every page of each array (its own values back), so that no first-touch page fault
    happens later. Call only before the arrays are shared with the audio thread: a value the
    callback changes between the read and the write would be lost. Returns the pages touched.
    """
    import numpy as np

    page = os.sysconf("SC_PAGE_SIZE") if hasattr(os, "sysconf") else 4096
    pages = 0
    for a in arrays:
        if a is None or not isinstance(a, np.ndarray) or a.size == 0:
            continue
        if not a.flags.c_contiguous or not a.flags.writeable:
            continue
        flat = a.reshape(-1)
        step = max(1, page // flat.itemsize)
        # through a copy: numpy skips an assignment whose source is its own destination, which
        # would leave the pages untouched (and reading a fresh page maps only the zero page)
        flat[::step] = flat[::step].copy()
        flat[-1:] = flat[-1:].copy()
        pages += -(-flat.nbytes // page)
    return pages


# ---- what each PortAudio host API offers ------------------------------------------------------

def host_stream_info(ffi, lib, host_type, realtime=True):
    """Host-API-specific stream info that asks for a real-time thread, or ``ffi.NULL``.

    Only WASAPI takes such a request at open time: ``PaWasapiStreamInfo`` with the flag
    ``paWinWasapiThreadPriority`` and ``threadPriority = eThreadPriorityProAudio``
    (``pa_win_wasapi.h``, version 1 of the struct). The returned object must stay alive until
    the stream is opened.
    """
    if not realtime or host_type != getattr(lib, "paWASAPI", None):
        return ffi.NULL
    try:
        info = ffi.new("PaWasapiStreamInfo*")
        info.size = ffi.sizeof("PaWasapiStreamInfo")
        info.hostApiType = lib.paWASAPI
        info.version = 1
        info.flags = lib.paWinWasapiThreadPriority
        info.threadPriority = lib.eThreadPriorityProAudio
    except (AttributeError, TypeError):  # an older sounddevice without these declarations
        return ffi.NULL
    return info


def _portaudio_ctypes(sd):
    """The PortAudio library sounddevice loaded, through ctypes (same path, same handle)."""
    import ctypes

    return ctypes.CDLL(sd._libname)


def enable_host_realtime(sd, stream_ptr, host_type, realtime=True):
    """Ask the host API for a real-time callback thread on an opened, not yet started stream.

    Returns one line saying what was asked. ALSA: ``PaAlsa_EnableRealtimeScheduling(stream, 1)``
    (from sounddevice's cffi handle if it declares the function, else through ctypes on the same
    library); the other hosts are described, nothing is called for them here.
    """
    lib = sd._lib
    if not realtime:
        return "real time not asked (--no-realtime)"
    if host_type == getattr(lib, "paALSA", 8):
        fn = getattr(lib, "PaAlsa_EnableRealtimeScheduling", None)
        if fn is not None:
            err = fn(stream_ptr, 1)
        else:
            import ctypes

            try:
                c = _portaudio_ctypes(sd).PaAlsa_EnableRealtimeScheduling
            except (OSError, AttributeError):
                return "ALSA: this PortAudio has no PaAlsa_EnableRealtimeScheduling"
            c.argtypes, c.restype = [ctypes.c_void_p, ctypes.c_int], ctypes.c_int
            addr = int(sd._ffi.cast("uintptr_t", stream_ptr))
            err = c(ctypes.c_void_p(addr), 1)
        if err != 0:
            return f"ALSA: PaAlsa_EnableRealtimeScheduling refused ({err})"
        return "ALSA: real-time callback thread asked for"
    if host_type == getattr(lib, "paJACK", 12):
        return "JACK: the callback runs in the server's process thread (jackd -R gives it)"
    if host_type == getattr(lib, "paWASAPI", 13):
        return "WASAPI: pro-audio thread priority asked for"
    if host_type == getattr(lib, "paCoreAudio", 5):
        return "Core Audio: the system schedules the I/O thread"
    return "this host API offers no real-time request; the host decides"


# ---- which thread runs the callback, and with what policy -------------------------------------

def thread_switches():
    """{tid: voluntary + involuntary context switches} of this process's threads (proc(5))."""
    out = {}
    try:
        tids = os.listdir("/proc/self/task")
    except OSError:
        return out
    for tid in tids:
        try:
            n = 0
            with open(f"/proc/self/task/{tid}/status") as f:
                for line in f:
                    if line.startswith(("voluntary_ctxt_switches:",
                                        "nonvoluntary_ctxt_switches:")):
                        n += int(line.split()[1])
            out[int(tid)] = n
        except (OSError, ValueError):
            continue
    return out


def thread_policy(tid):
    """(policy name, priority) of thread ``tid`` of this process, or ("unknown", 0)."""
    try:
        pol = os.sched_getscheduler(tid)
        prio = os.sched_getparam(tid).sched_priority
    except (OSError, AttributeError):
        return "unknown", 0
    return POLICY_NAMES.get(pol, str(pol)), int(prio)


def python_thread_ids():
    """Native ids of the threads Python knows (the callback never runs on one of them)."""
    ids = set()
    for t in threading.enumerate():
        nid = getattr(t, "native_id", None)
        if nid is not None:
            ids.add(int(nid))
    return ids


class ThreadFinder:
    """Find the callback's thread from outside it.

    :meth:`begin` notes every thread's context switches and the block count; :meth:`find`
    (at least ``min_blocks`` blocks later) picks the thread, Python's own excluded, whose
    switches grew most, if they grew by at least half the blocks delivered meanwhile (a thread
    that runs the callback sleeps and wakes once per block, or more often).
    """

    def __init__(self, min_blocks=20):
        self.min_blocks = int(min_blocks)
        self._base = None
        self.tid = None

    def begin(self, blocks):
        self._base = (thread_switches(), int(blocks))
        self.tid = None

    def ready(self, blocks):
        return self._base is not None and int(blocks) - self._base[1] >= self.min_blocks

    def find(self, blocks):
        """The callback thread's tid, or None when it cannot be told yet."""
        if self.tid is not None:
            return self.tid
        if not self.ready(blocks):
            return None
        before, b0 = self._base
        now = thread_switches()
        ours = python_thread_ids()
        db = int(blocks) - b0
        best, best_d = None, -1
        for tid, n in now.items():
            if tid in ours:
                continue
            d = n - before.get(tid, 0)
            if d > best_d:
                best, best_d = tid, d
        if best is not None and 2 * best_d >= db:
            self.tid = best
            return best
        self._base = (now, int(blocks))  # try again over the next interval
        return None


def describe(info):
    """One start-up line from an Engine's ``snapshot()['realtime']``."""
    if info.get("policy") in (None, "unknown"):
        pol = "callback thread not identified yet"
    else:
        pol = f"callback thread {info['policy']}"
        if info.get("policy") in REALTIME_POLICIES:
            pol += f" priority {info['priority']}"
    return (f"real time: {pol}; {info.get('memory', '')}; host API "
            f"{info.get('host_api') or 'unknown'}")
