"""``livedyn run`` headless with the demo, and ``livedyn devices``, as a user runs them.

Sources of the checks
---------------------
* The ducking scenario: livedyn.demo.scenario()['phrases'] gives the spans in which the narrator
  sounds; the shipped preset bed-under-narrator ducks the music bed by its ``range`` (12 dB)
  while the narrator speaks and not at all in pauses (the preset's own description; common
  practice, no source).
* Output keys of --stats-json: the README's description of ``livedyn run --stats-json`` (block
  counts, late and flagged blocks, callback-time and wake-up-interval percentiles, the latencies
  the stream reports).
"""
from __future__ import annotations

import json
import math
import os
import re
import subprocess
import sys
import uuid
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from livedyn import algorithms, demo, presets
from livedyn.automation import Automation
from livedyn.cli import CAUTION
from tests.conftest import jack_registry, jackd_pids

FS = 48000
LIVEDYN = Path(sys.executable).parent / "livedyn"
STATUS_RE = re.compile(r"^\s*(\d+\.\d) s  in (\S+)  out (\S+) dBFS  GR (\S+) dB  load (\S+) % "
                       r"\(max (\S+) %\)  late (\d+)  flagged (\d+)$")


def test_run_headless_key_demo_records_ducks_and_leaves_no_server(tmp_path):
    rec, stats = tmp_path / "rec", tmp_path / "stats.json"
    r = subprocess.run([str(LIVEDYN), "run", "--headless", "--key-demo", "--seconds", "3",
                        "--record", str(rec), "--stats-json", str(stats), "--no-ui"],
                       capture_output=True, text=True, timeout=120, cwd=tmp_path)
    print(r.stdout)
    assert r.returncode == 0, r.stderr
    assert "Traceback" not in r.stderr
    lines = r.stdout.splitlines()
    assert lines[0] == CAUTION
    name = re.search(r"^headless: JACK server (\S+) \(dummy backend", r.stdout, re.M).group(1)

    # one status line per second
    status = [STATUS_RE.match(line) for line in lines]
    times = [float(m.group(1)) for m in status if m]
    assert 2 <= len(times) <= 4, r.stdout
    assert all(0.8 < b - a < 1.3 for a, b in zip(times, times[1:])), times
    assert 0.9 < times[0] < 1.4

    # the recording
    main, fs = sf.read(str(rec / "main.wav"), dtype="float32", always_2d=True)
    key, _ = sf.read(str(rec / "key.wav"), dtype="float32", always_2d=True)
    out, _ = sf.read(str(rec / "out.wav"), dtype="float32", always_2d=True)
    assert fs == FS and main.shape[1] == 2 and key.shape[1] == 1 and out.shape[1] == 2
    assert len(main) == len(key) == len(out)
    assert 2.8 * FS <= len(out) <= 3.6 * FS
    sc = demo.scenario(FS, 3.0)
    n = min(len(main), len(sc["music"]))
    assert np.array_equal(main[:n], sc["music"][:n])  # the demo's music bed, as played
    assert np.array_equal(key[:n], sc["narrator"][:n])
    schema = algorithms.get("ducker").schema
    auto = Automation.load(rec / "automation.txt", schema)
    preset = presets.load("bed-under-narrator")
    assert auto.samplerate == FS
    assert {nm: v for f, nm, v in auto if f == 0} == \
        {prm.name: preset.values.get(prm.name, prm.default) for prm in schema}

    # ducking audible in out.wav: gain out/main per 50 ms window
    win = FS // 20
    depth = presets.load("bed-under-narrator").values["range"]

    def gain_db(t0, t1):
        g = []
        for s in range(int(t0 * FS), int(t1 * FS) - win + 1, win):
            a = float(np.sqrt(np.mean(main[s:s + win] ** 2)))
            b = float(np.sqrt(np.mean(out[s:s + win] ** 2)))
            g.append(20 * math.log10(b / a))
        return np.array(g)

    (p0, p1), = [p for p in sc["phrases"] if p[0] < 3.0]
    # after the 0.5 s fade-in and before the narrator's first onset: no gain reduction
    pause = gain_db(0.55, p0 - 0.02)
    # within the phrase, after the attack (20 ms time constant: 0.2 s is ten of them)
    phrase = gain_db(p0 + 0.2, min(p1, len(out) / FS))
    print(f"pause gain {pause.min():.2f}..{pause.max():.2f} dB; phrase gain median "
          f"{np.median(phrase):.2f} dB, max {phrase.max():.2f} dB (range {depth} dB)")
    assert len(pause) >= 4 and np.all(np.abs(pause) < 0.5)
    assert len(phrase) >= 20
    assert abs(np.median(phrase) + depth) < 1.0 and np.all(phrase < -depth / 2)

    # statistics: valid JSON with the documented keys
    snap = json.loads(stats.read_text())
    for k in ("blocks", "late_blocks", "flagged_blocks", "callback_load", "wakeup_interval",
              "stream_latency_s", "realtime_granted"):
        assert k in snap, k
    for k in ("median", "p99", "p99_9", "max"):
        assert 0 <= snap["callback_load"][k] < 10 and snap["wakeup_interval"][k] >= 0
    assert set(snap["stream_latency_s"]) == {"input", "output"}
    # taken when the run ended, before the 50 ms fade-out that the recording also holds
    assert 0 <= len(out) - snap["blocks"] * 64 <= 0.2 * FS

    # nothing of the server is left
    assert not jackd_pids(name)
    assert name not in [nm for _, nm in jack_registry()]


def test_devices_without_a_server_says_so_or_lists(tmp_path):
    env = dict(os.environ, JACK_DEFAULT_SERVER=f"nobody-{uuid.uuid4().hex[:8]}",
               JACK_NO_START_SERVER="1")
    r = subprocess.run([str(LIVEDYN), "devices"], capture_output=True, text=True, timeout=60,
                       env=env, cwd=tmp_path)
    assert r.returncode == 0 and "Traceback" not in r.stderr, r.stderr
    text = r.stdout.strip()
    if text.startswith("no audio devices found"):
        assert "--headless" in text and len(text.splitlines()) == 1
    else:  # a machine with a soundcard lists it
        assert re.match(r"#\s+name\s+host API\s+in\s+out\s+rate", text), text


@pytest.mark.jack(capture=3, playback=5, realtime=False)
def test_devices_lists_the_running_server_with_its_channels(jack_server, tmp_path):
    r = subprocess.run([str(LIVEDYN), "devices"], capture_output=True, text=True, timeout=60,
                       cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    rows = [line.split() for line in r.stdout.splitlines()[1:]]
    system = [row for row in rows if row[1] == "system"]
    assert system, r.stdout
    # index, name, host API (two words), in, out, rate
    assert system[0][-3:] == ["3", "5", "48000"], r.stdout


def test_headless_with_a_device_is_one_line_error(capsys):
    # --headless picks the JACK server's own device; a --device beside it would be ignored
    from livedyn import cli

    rc = cli.main(["run", "--headless", "--device", "USB", "--seconds", "1", "--no-ui"])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2
    assert len(err) == 1 and err[0].startswith("livedyn: error: --headless")
