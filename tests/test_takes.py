"""Takes written under their final names: :class:`livedyn.wavio.TakeWriter`, and a live run
killed with SIGKILL that leaves readable recordings.

Sources of the checks
---------------------
* File layout: EBU Tech 3306 (RF64, the ds64 chunk in place of JUNK); reading back is done by
  libsndfile through soundfile (an independent reader) and by livedyn's WavReader.
* Loss bound after SIGKILL: the README's description of ``--record`` (header updated at least
  once a second); the test allows 1.5 s.
"""
from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from livedyn import wavio
from livedyn.wavio import TakeWriter, WavError, WavReader
from tests.conftest import jack_registry, jackd_pids

LIVEDYN = Path(sys.executable).parent / "livedyn"
TOL = {"FLOAT": 0.0, "PCM_16": 2**-15, "PCM_24": 2**-23, "PCM_32": 2**-31}


def _noise(frames, ch, seed=1):
    return np.random.default_rng(seed).uniform(-1, 1, (frames, ch)).astype(np.float32)


@pytest.mark.parametrize("subtype", sorted(TOL))
@pytest.mark.parametrize("channels", [1, 2, 3])
@pytest.mark.parametrize("container", ["auto", "RF64"])
def test_take_reads_back_through_libsndfile_and_wavreader(tmp_path, subtype, channels,
                                                          container):
    p = tmp_path / "t.wav"
    x = _noise(1001, channels)
    with TakeWriter(p, 44100, channels, subtype, container=container) as w:
        w.write(x[:400])
        w.write(x[400:])
    y, fs = sf.read(p, dtype="float32", always_2d=True)
    assert fs == 44100 and y.shape == x.shape
    assert np.abs(y - x).max() <= TOL[subtype]
    with WavReader(p) as r:
        assert r.format == ("RF64" if container == "RF64" else "WAVEX")
        assert r.subtype == subtype and r.frames == 1001
        assert np.array_equal(r.read(), y)


def test_take_is_readable_before_close_up_to_the_last_sync(tmp_path):
    p = tmp_path / "t.wav"
    x = _noise(4800, 2)
    w = TakeWriter(p, 48000, 2, sync_seconds=3600.0)
    w.write(x[:1000])
    assert sf.info(str(p)).frames == 0  # nothing synced yet, but a valid empty file
    w.sync()
    w.write(x[1000:])  # written, not yet in the header: a SIGKILL now loses these frames
    y, _ = sf.read(p, dtype="float32", always_2d=True)
    assert np.array_equal(y, x[:1000]) and w.synced_frames == 1000
    w.close()
    assert sf.info(str(p)).frames == 4800


def test_take_syncs_on_its_own_clock(tmp_path):
    p = tmp_path / "t.wav"
    w = TakeWriter(p, 48000, 1, sync_seconds=0.5)
    now = [0.0]
    w._clock = lambda: now[0]
    w._last_sync = 0.0
    w.write(np.zeros((100, 1), np.float32))
    assert w.synced_frames == 0
    now[0] = 0.6
    w.write(np.zeros((100, 1), np.float32))
    assert w.synced_frames == 200 and sf.info(str(p)).frames == 200
    w.close()


def test_take_becomes_rf64_in_place_past_the_limit(tmp_path):
    p = tmp_path / "t.wav"
    x = _noise(3000, 2)
    w = TakeWriter(p, 48000, 2, "PCM_16")
    w.data_limit = 4000  # bytes: 1000 frames; stands for the 4 GiB of a real RIFF file
    w.write(x[:500])
    w.sync()
    assert sf.info(str(p)).format == "WAVEX"
    w.write(x[500:])
    w.sync()
    assert sf.info(str(p)).format == "RF64" and sf.info(str(p)).frames == 3000
    w.close()
    y, _ = sf.read(p, dtype="float32", always_2d=True)
    assert np.abs(y - x).max() <= TOL["PCM_16"]


def test_take_refuses_an_existing_file(tmp_path):
    p = tmp_path / "t.wav"
    p.write_bytes(b"old")
    with pytest.raises(WavError) as e:
        TakeWriter(p, 48000, 1)
    assert "already exists" in str(e.value) and "\n" not in str(e.value)
    assert p.read_bytes() == b"old"


def test_odd_data_gets_its_pad_byte(tmp_path):
    p = tmp_path / "t.wav"
    with TakeWriter(p, 48000, 1, "PCM_24") as w:
        w.write(_noise(3, 1))
    assert p.stat().st_size == TakeWriter.HEADER + 9 + 1
    assert sf.info(str(p)).frames == 3


def test_failed_write_keeps_the_take_readable(tmp_path, monkeypatch):
    p = tmp_path / "t.wav"
    x = _noise(2000, 2)
    w = TakeWriter(p, 48000, 2, sync_seconds=3600.0)
    w.write(x[:1000])
    real = os.write
    calls = []

    def full(fd, data):  # half a block fits, then the disk is full
        if fd != w._fd:
            return real(fd, data)
        calls.append(len(data))
        if len(calls) == 1:
            return real(fd, bytes(data)[:len(data) // 2 + 3])
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(wavio.os, "write", full)
    with pytest.raises(WavError) as e:
        w.write(x[1000:])
    monkeypatch.undo()
    assert "No space left on device" in str(e.value) and "\n" not in str(e.value)
    assert w.closed and w.error
    y, _ = sf.read(p, dtype="float32", always_2d=True)
    assert len(y) == 1500 and np.array_equal(y, x[:1500])  # whole frames written
    with pytest.raises(WavError):
        w.write(x[:10])


def test_replaced_render_output_keeps_its_mode(tmp_path):
    p = tmp_path / "o.wav"
    p.write_bytes(b"x")
    os.chmod(p, 0o600)
    wavio.write_wav(p, np.zeros((10, 1), np.float32), 48000)
    assert (p.stat().st_mode & 0o777) == 0o600


def _proc_state(pid):
    try:
        with open(f"/proc/{pid}/stat") as f:
            return f.read().split(")")[-1].split()[0]  # R, S, Z, ...
    except OSError:
        return None


def _free_server(name, tries=20):
    """After livedyn was killed: its server gets SIGTERM from the kernel (it dies with its
    parent); wait for it, kill what is left, and free its entry in JACK's table."""
    from livedyn.engine.jackserver import JackError, JackServer

    why = ""
    for _ in range(tries):
        for pid in jackd_pids(name):
            if _proc_state(pid) not in (None, "Z"):
                time.sleep(0.25)  # still shutting down on its SIGTERM
        entries = [pid for pid, n in jack_registry() if n == name]
        if not entries:
            return ""
        for pid in jackd_pids(name):
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
        if all(_proc_state(pid) in (None, "Z") for pid in entries):
            srv = JackServer(48000, 64, name=name)
            try:
                srv.start(timeout=5.0)
            except JackError as e:
                why = str(e)
            srv.stop()
        time.sleep(0.25)
    return why or f"entry held by {[(p, _proc_state(p)) for p, n in jack_registry() if n == name]}"


def test_sigkill_mid_take_leaves_readable_files(tmp_path):
    rec = tmp_path / "R"
    env = dict(os.environ, JACK_NO_START_SERVER="1")
    proc = subprocess.Popen([str(LIVEDYN), "run", "--headless", "--no-ui", "--key-demo",
                             "--seconds", "20", "--record", str(rec)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            cwd=tmp_path, env=env)
    name = None
    t_stream = None
    try:
        for line in proc.stdout:
            m = re.search(r"^headless: JACK server (\S+) \(dummy backend", line)
            if m:
                name = m.group(1)
            if line.startswith("latency: processor"):  # the stream has started
                t_stream = time.monotonic()
                break
        assert t_stream is not None, proc.stderr.read()
        time.sleep(5.0)
        elapsed = time.monotonic() - t_stream
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        if name is not None:
            _free_server(name)
    assert name is not None
    assert not jackd_pids(name)
    assert name not in [n for _, n in jack_registry()], _free_server(name, tries=1)
    lengths = {}
    for f in ("main", "key", "out"):
        p = rec / f"{f}.wav"
        assert p.exists(), sorted(os.listdir(rec))
        data, fs = sf.read(p, dtype="float32", always_2d=True)
        lengths[f] = len(data) / fs
    assert not [n for n in os.listdir(rec) if n.endswith(".tmp")]
    print(f"elapsed {elapsed:.2f} s before SIGKILL; kept {lengths}")
    for f, kept in lengths.items():
        assert kept >= elapsed - 1.5, (f, kept, elapsed)
        assert kept <= elapsed + 0.5
