"""livedyn with no real-time flag is granted real time and is as steady as a plain-C client.

Two runs of the same length in one test, at the same time, each on its own identically started
headless server (48 kHz, 64 frames, ``jackd -R -S``): ``livedyn run --headless --key-demo
--no-ui --stats-json S.json`` with no flag, and, from the moment livedyn's stream runs, a
PortAudio client written in C that only copies its input to its output
(``tests/native/copy_client.c``, counting late blocks by livedyn's own rule). Run at the same
time, both meet the same load from the rest of the machine; run one after the other, they did
not (measured here in turn: the C client 4 to 335 late in 8 s, livedyn 3 to 113). S.json must
report real time granted to the callback's thread, and livedyn's late blocks must be at most
twice the C client's (scaled to the same number of blocks) plus ALLOWANCE.

Why an allowance: a late block here is mostly the rest of the machine preempting the
server or the client, and at a few late blocks per run a single such event doubles the ratio
(0 against 1 is "infinitely worse"). ALLOWANCE = 10 blocks of 6000 (0.17 %) stands for a few
such events (common practice, no source). Measured here at the same time (C client, livedyn)
late blocks in 8 s: (230, 220), (425, 404), (38, 40), (206, 215), (83, 90) while other test
runs loaded both cores.
"""
from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

LIVEDYN = Path(sys.executable).with_name("livedyn")
CLIENT = Path(__file__).with_name("native") / "copy_client.c"
SECONDS = 8
ALLOWANCE = 10


@pytest.mark.skipif(shutil.which("cc") is None, reason="no C compiler (cc) for the C client")
@pytest.mark.jack(samplerate=48000, period=64, capture=2, playback=2, realtime=True)
def test_livedyn_is_granted_real_time_and_as_steady_as_a_plain_c_client(jack_server, tmp_path):
    import sounddevice as sd

    if not jack_server.realtime_granted:
        pytest.skip(f"this machine refuses real time to jackd: {jack_server.realtime_note}")
    exe = tmp_path / "copy_client"
    subprocess.run(["cc", "-O2", str(CLIENT), "-o", str(exe), "-ldl"], check=True)
    env = dict(os.environ, **jack_server.client_env())
    stats = tmp_path / "S.json"
    run = subprocess.Popen([str(LIVEDYN), "run", "--headless", "--key-demo", "--no-ui",
                            "--seconds", str(SECONDS), "--stats-json", str(stats)],
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                           cwd=tmp_path)
    try:
        out = []
        for ln in run.stdout:  # the start-up line comes once livedyn's stream runs
            out.append(ln)
            if ln.startswith("real time: ") or ln.startswith("done:"):
                break
        # the C client runs in the same seconds, so that both meet the same load
        r = subprocess.run([str(exe), sd._libname, "system", "48000", "64", "2", str(SECONDS)],
                           env=env, capture_output=True, text=True, timeout=SECONDS + 30)
        rest, err = run.communicate(timeout=SECONDS + 120)
    finally:
        if run.poll() is None:
            run.kill()
            run.wait()
    assert run.returncode == 0, err[-500:]
    assert r.returncode == 0, r.stderr[-500:]
    c = {k: v for k, v in re.findall(r"(\w+)=(\S+)", r.stdout)}
    c_blocks, c_late = int(c["blocks"]), int(c["late"])
    assert c["hostapi"].startswith("JACK")
    # it ran (under heavy load here a server lost up to 30 % of its cycles: the late counts
    # below are compared per block)
    assert c_blocks > 0.5 * SECONDS * 48000 / 64
    s = json.loads(stats.read_text())
    stdout = "".join(out) + rest
    rt = s["realtime"]
    line = [ln for ln in stdout.splitlines() if ln.startswith("real time: ")]
    print(f"\nC client: {c_blocks} blocks, {c_late} late, {c['flagged']} flagged; livedyn: "
          f"{s['blocks']} blocks, {s['late_blocks']} late, {s['flagged_blocks']} flagged; "
          f"{line}")
    # real time granted with no flag: the server ran with -R and the callback's thread has a
    # real-time policy; the start-up line says so
    assert s["realtime_granted"] is True and s["server_realtime"] is True
    assert rt["requested"] and rt["policy"] in ("SCHED_FIFO", "SCHED_RR")
    assert rt["host_api"] == "JACK Audio Connection Kit"
    assert len(line) == 1 and rt["policy"] in line[0]
    scaled = c_late * s["blocks"] / max(c_blocks, 1)
    assert s["late_blocks"] <= 2 * scaled + ALLOWANCE, (s["late_blocks"], c_late)
