"""Timing that understands hosts: burst delivery, and the overrun guard's CPU-time budget.

* Hosts often serve one host period as several callbacks back to back (a 256-frame JACK period
  as four 64-frame callbacks, PortAudio's buffer adaptation). A block is late when its host
  cycle began more than 1.5 host periods after the previous cycle, the host period being the
  frames delivered between cycle starts (DEVELOPERS.md, "The live engine"; common practice,
  no source). A clean burst stream is therefore about as late as a stream whose host period
  matches the block size, measured in the same test on the same kind of server.
* The overrun guard compares the callback's own CPU time (``CLOCK_THREAD_CPUTIME_ID``,
  POSIX.1-2008 clock_gettime) with the block period, so time the callback's thread spends
  preempted or stopped does not count against the algorithm.
"""
from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import livedyn
from livedyn.engine import callback as cb
from livedyn.engine import stream as st
from livedyn.engine.engine import ArraySource, Engine
from livedyn.engine.jackserver import JackServer
from tests.conftest import make_sure_gone, terminate_portaudio

FS = 48000
ROOT = Path(__file__).resolve().parent.parent


def _late_run(period, blocksize, seconds=2.0, realtime=True):
    """Late and total blocks of a compressor on a server of host period ``period`` with
    callbacks of ``blocksize`` frames."""
    srv = JackServer(FS, period, realtime=realtime,
                     name=f"livedyn-t-{os.getpid()}-{period}-{blocksize}")
    srv.start()
    try:
        st.reinitialise()
        proc = livedyn.Processor("compressor", FS, 2, threshold=-30)
        x = (0.2 * np.random.default_rng(3).standard_normal((FS, 2))).astype(np.float32)
        eng = Engine(proc, blocksize, device="system", main_source=ArraySource(x, loop=True),
                     meters=False)
        eng.start()
        try:
            time.sleep(0.5)  # start-up (the first cycles of a new client) is not counted
            late0, blocks0 = int(eng.stats[cb.S_LATE]), int(eng.stats[cb.S_BLOCKS])
            time.sleep(seconds)
            snap = eng.snapshot()
        finally:
            eng.stop()
        return (snap["late_blocks"] - late0, snap["blocks"] - blocks0,
                snap.get("host_period_frames"))
    finally:
        terminate_portaudio()
        srv.stop()
        make_sure_gone(srv)


def test_a_clean_burst_stream_counts_about_as_few_late_blocks_as_a_matched_one():
    runs = {}
    for period, bs in ((64, 64), (256, 64), (1024, 128)):
        runs[(period, bs)] = _late_run(period, bs)
    print({f"host {p} / block {b}": f"{late} late of {n}, host period seen {hp}"
           for (p, b), (late, n, hp) in runs.items()})
    matched = runs[(64, 64)][0]
    noise = 3 * matched + 10  # "within noise": a few scheduling hiccups either way
    for (period, bs), (late, n, hp) in runs.items():
        assert n > 0.8 * 2.0 * FS / bs, (period, bs, n)  # the run really streamed
        assert hp == period, (period, bs, hp)  # the engine saw the host's period
        assert late <= noise, (period, bs, late, matched)


STOPPED_CHILD = r'''
import ctypes, sys
import numpy as np
import livedyn
from livedyn.engine import callback as cb
from livedyn.engine.engine import Engine
eng = Engine(livedyn.Processor("compressor", 48000, 2), 64, device="system")
eng.ud[cb.U_GUARD_ON] = 1
eng.ud[cb.U_BUDGET_NS] = 3_000_000  # 3 ms of the callback's own time
eng.set_canary(1, 1_500_000)  # every block spins 1.5 ms of wall time
f = ctypes.CFUNCTYPE(ctypes.c_int, ctypes.c_void_p, ctypes.c_void_p, ctypes.c_ulong,
                     ctypes.c_void_p, ctypes.c_ulong, ctypes.c_void_p)(cb.native_callback.address)
inp = np.zeros((64, eng.n_in), np.float32)
out = np.zeros((64, eng.n_out), np.float32)
print("go", flush=True)
sys.stdin.readline()
for i in range(int(sys.argv[1])):
    f(inp.ctypes.data, out.ctypes.data, 64, None, 0, eng.ud.ctypes.data)
print("trips", int(eng.stats[cb.S_GUARD_TRIPS]), "over", int(eng.ud[cb.U_GUARD_COUNT]),
      "canary", int(eng.stats[cb.S_CANARY]), "wall_max_ns", int(eng.stats[cb.S_EL_MAX]),
      flush=True)
'''


def test_time_the_callback_thread_is_stopped_does_not_count_against_the_guard(jack_server,
                                                                              tmp_path):
    """The callback run 100 times in a child that is stopped (SIGSTOP) for 5 ms after every
    1 ms it runs: each block's wall time is far above the 3 ms budget, its own CPU time
    (1.5 ms of spinning) below it."""
    script = tmp_path / "child.py"
    script.write_text(STOPPED_CHILD)
    p = subprocess.Popen([sys.executable, str(script), "100"], stdin=subprocess.PIPE,
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=ROOT)
    try:
        assert p.stdout.readline().strip() == "go"
        p.stdin.write("\n")
        p.stdin.flush()
        while p.poll() is None:
            time.sleep(0.001)
            os.kill(p.pid, signal.SIGSTOP)
            time.sleep(0.005)
            os.kill(p.pid, signal.SIGCONT)
        out, err = p.communicate(timeout=30)
    finally:
        if p.poll() is None:
            os.kill(p.pid, signal.SIGCONT)
            p.kill()
            p.wait()
    assert p.returncode == 0, err[-2000:]
    words = out.split()
    res = dict(zip(words[::2], map(int, words[1::2])))
    print(res)
    assert res["canary"] == 100
    assert res["wall_max_ns"] > 3_000_000  # the stops really stretched the blocks' wall time
    assert res["trips"] == 0


HOG = "import time\nt = time.time() + 30\nwhile time.time() < t:\n    pass\n"


@pytest.mark.jack(realtime=False)
def test_a_cheap_algorithm_never_trips_the_guard_while_other_processes_hog_the_cpu(
        jack_server):
    proc = livedyn.Processor("compressor", FS, 2, threshold=-30)
    x = (0.2 * np.random.default_rng(4).standard_normal((FS, 2))).astype(np.float32)
    eng = Engine(proc, 64, main_source=ArraySource(x, loop=True), meters=False)
    eng.ud[cb.U_GUARD_ON] = 1  # the guard as for a user file: the compressor is cheap
    hogs = [subprocess.Popen([sys.executable, "-c", HOG]) for _ in range(2 * os.cpu_count())]
    eng.start()
    try:
        time.sleep(3.0)
        snap = eng.snapshot()
    finally:
        eng.stop()
        for h in hogs:
            h.kill()
            h.wait()
    print(f"{snap['blocks']} blocks, {snap['late_blocks']} late, wall max "
          f"{snap['callback_load']['max']:.2f} periods, CPU max {snap['callback_cpu_max']:.2f}")
    assert snap["blocks"] > 1000
    assert int(eng.stats[cb.S_GUARD_TRIPS]) == 0 and eng.guard_tripped() is None
