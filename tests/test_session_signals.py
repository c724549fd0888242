"""A live run stopped by SIGINT, SIGTERM or SIGHUP stops in order and loses nothing.

The session's teardown (livedyn/engine/session.py, DEVELOPERS.md "The live engine"): fade out,
close the recordings under their final names, write the automation and the statistics, shut
PortAudio down, stop the server and free its entry in JACK's table of servers and its /dev/shm
objects. Each run is killed about 4 s after its start line (the line that reports the stream's
latencies, printed once the stream runs); its take must hold at least that time minus 0.1 s.
"""
from __future__ import annotations

import glob
import json
import re
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
import soundfile as sf

from livedyn import algorithms
from livedyn.automation import Automation
from tests.conftest import jack_registry, jackd_pids, make_sure_gone

LIVEDYN = Path(sys.executable).parent / "livedyn"
FS = 48000


def _reader(pipe, sink):
    for line in pipe:
        sink.append((time.monotonic(), line.rstrip("\n")))


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM, signal.SIGHUP],
                         ids=["SIGINT", "SIGTERM", "SIGHUP"])
def test_a_signal_stops_the_run_in_order_and_keeps_the_whole_take(tmp_path, sig):
    from livedyn.engine.jackserver import JackServer

    rec = tmp_path / "R"
    # real-time scheduling as a user's machine gives it, so that the stream keeps time
    p = subprocess.Popen([str(LIVEDYN), "run", "--headless", "--realtime", "--no-ui",
                          "--key-demo", "--seconds", "20", "--record", str(rec),
                          "--stats-json", str(tmp_path / "stats.json")],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=tmp_path)
    out, err = [], []
    for pipe, sink in ((p.stdout, out), (p.stderr, err)):
        threading.Thread(target=_reader, args=(pipe, sink), daemon=True).start()
    name = t_start = None
    try:
        t_end = time.monotonic() + 90
        while time.monotonic() < t_end and p.poll() is None and t_start is None:
            for t, line in list(out):
                m = re.search(r"JACK server (\S+) \(dummy backend", line)
                if m:
                    name = m.group(1)
                if "stream reports input" in line:
                    t_start = t
            time.sleep(0.02)
        assert name and t_start, (out, err)
        while time.monotonic() < t_start + 4.0:
            time.sleep(0.01)
        t_kill = time.monotonic()
        p.send_signal(sig)
        rc = p.wait(timeout=30)
        time.sleep(0.1)
    finally:
        if p.poll() is None:
            p.kill()
            p.wait(10)
        if name and (name in [n for _, n in jack_registry()] or jackd_pids(name)):
            srv = JackServer(name=name)
            leftover = True
            srv.reclaim()
            make_sure_gone(srv)
        else:
            leftover = False
    elapsed = t_kill - t_start
    text = "\n".join(line for _, line in out + err)
    print(f"{sig.name}: exit code {rc}, killed {elapsed:.2f} s after the start line")
    assert "Traceback" not in text
    assert rc == (0 if sig == signal.SIGINT else 128 + int(sig)), text[-2000:]
    assert any(line == f"stopping ({sig.name})" for _, line in out)
    assert sorted(f.name for f in rec.iterdir()) == ["automation.txt", "key.wav", "main.wav",
                                                     "out.wav"]
    lengths = {}
    for f in ("main", "key", "out"):
        info = sf.info(str(rec / f"{f}.wav"))
        data, fs = sf.read(str(rec / f"{f}.wav"), dtype="float32")
        assert fs == FS and len(data) == info.frames
        lengths[f] = len(data) / FS
    stats = json.loads((tmp_path / "stats.json").read_text())
    print(f"  take lengths {lengths} s; the callback had run {stats['frames'] / FS:.3f} s "
          f"when the statistics were taken")
    # nothing the callback produced is missing, and the take covers the run's time
    assert all(v * FS >= stats["frames"] for v in lengths.values())
    # and nothing short of the time the stream ran: the wall-clock time, or what the dummy
    # server delivered when it fell behind wall time on a loaded machine (its pace is not the
    # take's to keep; every frame the callback produced is checked just above)
    ran = min(elapsed, stats["frames"] / FS)
    assert all(v >= ran - 0.1 for v in lengths.values()), (lengths, elapsed, ran)
    auto = Automation.load(rec / "automation.txt", algorithms.get("ducker").schema)
    assert auto.samplerate == FS and len(list(auto)) > 0
    assert (tmp_path / "stats.json").exists()
    assert not leftover, f"the server {name} was left in JACK's table or running"
    assert not glob.glob(f"/dev/shm/jack_{name}_*") + glob.glob(f"/dev/shm/jack_sem.*_{name}_*")
