"""Real time by default: memory locking, pre-faulting, what each host API is asked, the
callback thread's policy as reported, and the headless server's fallback when -R is refused.

Sources: mlockall(2), getrlimit(2), getrusage(2) (minor faults), sched_getscheduler(2);
PortAudio's pa_linux_alsa.h and pa_win_wasapi.h for the host requests.
"""
from __future__ import annotations

import ctypes
import os
import resource
import shutil
import subprocess

import numpy as np
import pytest

from livedyn.engine import realtime as rt

FS = 48000


# ---- memory -----------------------------------------------------------------------------------

def test_lock_decision_follows_the_limit():
    inf = resource.RLIM_INFINITY
    mib = 2**20
    assert rt.lock_decision(8 * mib, 600 * mib, capable=True) == (True, "CAP_IPC_LOCK")
    assert rt.lock_decision(inf, 600 * mib, capable=False) == (True, "memlock unlimited")
    assert rt.lock_decision(2000 * mib, 600 * mib, capable=False)[0]
    ok, why = rt.lock_decision(8 * mib, 600 * mib, capable=False)
    # a finite limit too small (MCL_FUTURE would make later allocations fail): one line
    assert not ok and "8 MiB" in why and "600 MiB" in why and "livedyn ready" in why
    assert "\n" not in why
    assert not rt.lock_decision(1000 * mib, 600 * mib, capable=False)[0]  # < twice the map


def test_lock_memory_reports_what_the_system_did():
    locked, note = rt.lock_memory()
    assert "\n" not in note
    limit = resource.getrlimit(resource.RLIMIT_MEMLOCK)[0]
    allowed, _ = rt.lock_decision(limit, rt.mapped_bytes(), rt.has_capability(rt.CAP_IPC_LOCK))
    if allowed:  # e.g. root, or memlock unlimited: VmLck in /proc/self/status says it is done
        assert locked and note.startswith("memory locked") and rt.memory_locked() > 0
    else:
        assert not locked and note.startswith("memory not locked")
    assert rt.lock_memory() == (locked, note)  # idempotent


PREFAULT_CHILD = """
import os, resource, sys
import numpy as np
from livedyn.engine import realtime as rt
page = os.sysconf("SC_PAGE_SIZE")
def faults():
    return resource.getrusage(resource.RUSAGE_SELF).ru_minflt
def touch(a):
    f0 = faults()
    a[::page // 8] = 1.0
    return faults() - f0
import mmap
def fresh(nbytes):  # anonymous memory, no page there yet, in small pages (no huge pages)
    m = mmap.mmap(-1, nbytes)
    if hasattr(mmap, "MADV_NOHUGEPAGE"):
        m.madvise(mmap.MADV_NOHUGEPAGE)
    return np.frombuffer(m, np.float64)
n = 32 << 20
control = touch(fresh(n))  # no prefault: about one fault per page
a = fresh(n)
b = np.arange(1000, dtype=np.float32)  # fewer bytes than a page
pages = rt.prefault([a, b, None, np.zeros(0)])
after = touch(a)
print(pages, control, after, int(np.array_equal(b, np.arange(1000, dtype=np.float32))))
"""


def test_prefault_writes_every_page_and_keeps_the_values():
    """In a fresh process (this one may have its memory locked already, which faults every
    page in by itself), on memory in small pages: touching 32 MiB after prefault costs almost
    no page fault, where the same touch without it costs about one per page."""
    import sys

    r = subprocess.run([sys.executable, "-c", PREFAULT_CHILD], capture_output=True, text=True,
                       timeout=120)
    assert r.returncode == 0, r.stderr
    pages, control, after, same = map(int, r.stdout.split())
    page = os.sysconf("SC_PAGE_SIZE")
    print(f"\n{pages} pages; faults touching them: {control} without prefault, {after} after")
    assert pages == -(-(32 << 20) // page) + 1
    assert control > pages // 2  # the control shows that untouched pages do fault
    assert after < pages // 20
    assert same == 1


# ---- host API requests ------------------------------------------------------------------------

def test_wasapi_asks_for_pro_audio_priority_and_nothing_else_does():
    import sounddevice as sd

    ffi, lib = sd._ffi, sd._lib
    info = rt.host_stream_info(ffi, lib, lib.paWASAPI)
    assert info != ffi.NULL
    assert info.size == ffi.sizeof("PaWasapiStreamInfo") and info.hostApiType == lib.paWASAPI
    assert info.version == 1 and info.flags & lib.paWinWasapiThreadPriority
    assert info.threadPriority == lib.eThreadPriorityProAudio
    assert rt.host_stream_info(ffi, lib, lib.paWASAPI, realtime=False) == ffi.NULL
    for other in (lib.paALSA, lib.paJACK, lib.paCoreAudio):
        assert rt.host_stream_info(ffi, lib, other) == ffi.NULL


class _Lib:
    """A stand-in for sounddevice's cffi lib: the host API type ids, and a recording
    PaAlsa_EnableRealtimeScheduling when ``alsa`` is set."""

    paALSA, paJACK, paWASAPI, paCoreAudio = 8, 12, 13, 5

    def __init__(self, alsa=True):
        self.calls = []
        if alsa:
            self.PaAlsa_EnableRealtimeScheduling = lambda s, e: self.calls.append((s, e)) or 0


class _Sd:
    def __init__(self, lib, libname=None):
        import sounddevice as sd

        self._lib, self._ffi, self._libname = lib, sd._ffi, libname


def test_alsa_stream_is_asked_for_real_time_other_hosts_are_not():
    lib = _Lib()
    sd = _Sd(lib)
    line = rt.enable_host_realtime(sd, "stream", lib.paALSA)
    assert lib.calls == [("stream", 1)] and line.startswith("ALSA: real-time")
    for host in (lib.paJACK, lib.paWASAPI, lib.paCoreAudio, 7):
        assert rt.enable_host_realtime(sd, "stream", host)
    assert lib.calls == [("stream", 1)]  # never on another host's stream (it would corrupt it)
    assert "not asked" in rt.enable_host_realtime(sd, "stream", lib.paALSA, realtime=False)
    assert lib.calls == [("stream", 1)]


@pytest.mark.skipif(shutil.which("cc") is None, reason="no C compiler")
def test_alsa_request_goes_through_ctypes_when_cffi_does_not_declare_it(tmp_path):
    """sounddevice does not declare PaAlsa_EnableRealtimeScheduling: the call goes through
    ctypes on the library sounddevice loaded. A stand-in library records the arguments."""
    src = tmp_path / "fake.c"
    src.write_text("static void *last_s; static int last_e = -1;\n"
                   "int PaAlsa_EnableRealtimeScheduling(void *s, int e)"
                   "{ last_s = s; last_e = e; return 0; }\n"
                   "void *fake_last_s(void) { return last_s; }\n"
                   "int fake_last_e(void) { return last_e; }\n")
    so = tmp_path / "libfake.so"
    subprocess.run(["cc", "-shared", "-fPIC", str(src), "-o", str(so)], check=True)
    import sounddevice as sd

    buf = sd._ffi.new("char[64]")
    ptr = sd._ffi.cast("PaStream *", buf)
    line = rt.enable_host_realtime(_Sd(_Lib(alsa=False), str(so)), ptr, 8)
    fake = ctypes.CDLL(str(so))
    fake.fake_last_s.restype = ctypes.c_void_p
    assert line.startswith("ALSA: real-time")
    assert fake.fake_last_e() == 1
    assert fake.fake_last_s() == int(sd._ffi.cast("uintptr_t", buf))


def test_the_portaudio_sounddevice_loads_has_the_alsa_call_or_says_so():
    import sounddevice as sd

    pa = ctypes.CDLL(sd._libname)
    if not hasattr(pa, "PaAlsa_EnableRealtimeScheduling"):
        line = rt.enable_host_realtime(_Sd(_Lib(alsa=False), sd._libname), None, 8)
        assert "no PaAlsa_EnableRealtimeScheduling" in line
        pytest.skip("this PortAudio was built without ALSA")


# ---- which thread runs the callback -----------------------------------------------------------

def test_thread_finder_picks_the_thread_that_wakes_once_per_block():
    """A native thread (the wake-up measurement's) woken every 1.33 ms stands in for an audio
    thread: counted as 'blocks' by the test, it is the one found; Python's threads never are."""
    import threading

    from livedyn import readiness

    lib, why = readiness.build_wakeup()
    if lib is None:
        pytest.skip(why)
    finder = rt.ThreadFinder(min_blocks=20)
    finder.begin(0)
    assert finder.find(5) is None  # too few blocks yet
    res = {}
    t = threading.Thread(target=lambda: res.update(
        readiness.measure_wakeup(FS, 64, 0.6, lib=lib, priority=0)))
    before = set(rt.thread_switches())
    t.start()
    import time

    time.sleep(0.1)
    new = set(rt.thread_switches()) - before - rt.python_thread_ids()
    finder.begin(0)
    time.sleep(0.3)
    tid = finder.find(int(0.3 * FS / 64))
    t.join()
    assert tid in new and tid not in rt.python_thread_ids()


@pytest.mark.jack()
def test_engine_reports_the_callback_thread_policy_memory_and_host(jack_server):
    from livedyn import Processor
    from livedyn.engine.engine import ArraySource, Engine

    proc = Processor("compressor", FS, 2)
    src = ArraySource(np.zeros((FS, 2), np.float32), loop=True)
    eng = Engine(proc, 64, device="system", main_source=src, meters=False)
    try:
        before = eng.snapshot()["realtime"]
        assert before["policy"] == "unknown" and before["thread"] is None
        eng.start()
        info = eng.wait_realtime(2.0)
        snap = eng.snapshot()
    finally:
        eng.stop()
    print(f"\nrealtime: {info}")
    assert snap["realtime"]["thread"] == info["thread"] is not None
    assert info["thread"] not in rt.python_thread_ids()
    assert info["host_api"] == "JACK Audio Connection Kit" and info["requested"]
    assert info["host_request"].startswith("JACK:")
    # the server's -R gives the client's process thread a real-time policy (and only then)
    assert info["granted"] == jack_server.realtime_granted
    if jack_server.realtime_granted:
        assert info["policy"] in ("SCHED_FIFO", "SCHED_RR") and info["priority"] > 0
        assert snap["realtime_threads"] >= 1
    limit = resource.getrlimit(resource.RLIMIT_MEMLOCK)[0]
    allowed = rt.lock_decision(limit, rt.mapped_bytes(), rt.has_capability(rt.CAP_IPC_LOCK))[0]
    assert info["memory_locked"] == (allowed or rt.memory_locked() > 0)
    line = rt.describe(info)
    assert line.startswith("real time: callback thread ") and "host API JACK" in line


# ---- the headless server ----------------------------------------------------------------------

def test_headless_server_asks_for_real_time_by_default():
    from livedyn.engine.jackserver import JackServer

    if shutil.which("jackd") is None:
        pytest.skip("no jackd")
    s = JackServer(FS, 64)
    assert s.realtime and "-R" in s._cmd(True) and "--no-realtime" in s._cmd(False)
    assert JackServer(FS, 64, realtime=False).realtime_note.startswith("real time not asked")


@pytest.mark.skipif(shutil.which("setpriv") is None or shutil.which("jackd") is None
                    or os.geteuid() != 0, reason="needs root, setpriv and jackd to make the "
                                                 "system refuse real time")
def test_headless_server_falls_back_with_one_line_when_real_time_is_refused(tmp_path,
                                                                            monkeypatch):
    """jackd started without CAP_SYS_NICE (and rtprio 0) is refused SCHED_RR but keeps running:
    the server must notice, start plainly, and say how to get real time."""
    from livedyn.engine.jackserver import JackServer

    if resource.getrlimit(resource.RLIMIT_RTPRIO)[0] != 0:
        pytest.skip("the rtprio limit is not 0: dropping the capability would not refuse")
    wrapper = tmp_path / "jackd"
    wrapper.write_text(f"#!/bin/sh\nexec setpriv --bounding-set -sys_nice "
                       f"{shutil.which('jackd')} \"$@\"\n")
    wrapper.chmod(0o755)
    monkeypatch.setenv("PATH", f"{tmp_path}:{os.environ['PATH']}")
    s = JackServer(FS, 64, name=f"livedyn-refused-{os.getpid()}")
    try:
        s.start()
        assert s.alive() and not s.realtime_granted
        note = s.realtime_note
        print(f"\n{note}")
        assert "\n" not in note and "Cannot use real-time scheduling" in note
        assert "rtprio" in note and "livedyn ready" in note
        assert "--no-realtime" in s.proc.args
    finally:
        s.stop()


def test_console_stats_line_shows_the_grant_when_wide_enough():
    from prompt_toolkit.input import create_pipe_input

    from tests.test_console import FakeEngine, render

    e = FakeEngine()
    e.snap["realtime"] = {"policy": "SCHED_FIFO", "priority": 5, "granted": True,
                          "memory_locked": True}
    with create_pipe_input() as pipe:
        _, wide = render(e, pipe, 140, 40)
        assert "rt fifo 5 locked" in wide
        e.snap["realtime"] = {"policy": "SCHED_OTHER", "priority": 0, "granted": False,
                              "memory_locked": False}
        _, plain = render(e, pipe, 140, 40)
        assert "rt other" in plain and "locked" not in plain


def test_run_demo_and_bench_take_no_realtime_and_run_keeps_realtime(capsys):
    from livedyn.cli import build_parser

    ap = build_parser()
    assert ap.parse_args(["run"]).no_realtime is False  # real time is the default
    assert ap.parse_args(["run", "--realtime"]).no_realtime is False  # old flag: the default
    assert ap.parse_args(["run", "--no-realtime"]).no_realtime is True
    assert ap.parse_args(["demo", "--no-realtime"]).no_realtime is True
    assert ap.parse_args(["bench", "stream", "--no-realtime"]).no_realtime is True
    with pytest.raises(SystemExit) as e:
        ap.parse_args(["run", "--realtime", "--no-realtime"])
    assert e.value.code == 2 and "not allowed with" in capsys.readouterr().err
