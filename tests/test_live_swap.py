"""A user algorithm edited while it plays: the live swap, the watcher, the overrun guard.

All on the test's own headless JACK server (48 kHz, 64 frames, see conftest.py).

The step bound used for the crossfade (derived here, no outside source): while the output
crossfades from the old version's ``ya = ga * x`` to the new one's ``yb = gb * x`` with weight
``w`` rising by ``1/(N+1)`` per sample,

    y[n] - y[n-1] = (1-w) (ya[n]-ya[n-1]) + w (yb[n]-yb[n-1]) + (w[n]-w[n-1]) (yb - ya)[n-1]

and with gains <= 1 that change slowly (both versions are primed to their steady state), each
of the first two terms is at most ``max |x[n]-x[n-1]|`` and the last at most ``2 A / (N+1)``
for a signal of peak ``A``. So no output step may exceed ``max|dx| + 2A/(N+1)`` plus a small
allowance for the gain's own ripple. A switch without a crossfade (the negative control) makes
a step of ``|ga - gb| A``, far above that bound for the gain changes used here.
"""
from __future__ import annotations

import hashlib
import textwrap
import time

import numpy as np
import pytest

import livedyn
from livedyn.loader import load
from livedyn.engine import callback as cb
from livedyn.engine.engine import ArraySource, Engine
from livedyn.engine.watch import FileWatcher
from tests.waiting import stream_for, stream_until

FS = 48000
BS = 64
F0 = 220.0
A = 0.5  # sine peak: -6.02 dBFS

CURVE = '''
"""Half-slope compressor curve (test version {v})."""
PARAMS = ["threshold", "attack", "release"]


def gain_curve(level_db, p):
    over = level_db - ({thr})
    return -0.5 * over if over > 0.0 else 0.0
'''


def sine(seconds):
    t = np.arange(int(seconds * FS)) / FS
    return np.repeat((A * np.sin(2 * np.pi * F0 * t)).astype(np.float32)[:, None], 2, axis=1)


def write(path, text):
    tmp = path.with_name(path.name + ".part")
    tmp.write_text(textwrap.dedent(text))
    tmp.replace(path)  # as editors save: the watcher never sees half a file


def start_engine(path, record=None, **params):
    alg = load(path)
    proc = livedyn.Processor(alg, FS, 2, **params)
    # a whole number of sine periods loops without a seam (220 Hz: 0.5 s = 110 periods)
    eng = Engine(proc, BS, main_source=ArraySource(sine(0.5), loop=True), record_dir=record)
    eng.start()
    return eng


def expected_gr(thr):
    level = 20 * np.log10(A)
    return max(0.0, 0.5 * (level - thr))


def wait_for(cond, timeout):
    t_end = time.monotonic() + timeout
    while time.monotonic() < t_end:
        if cond():
            return True
        time.sleep(0.01)
    return False


def peak_out(eng, seconds=0.15):
    """Largest block peak of the output over ``seconds`` (one block alone may miss the crest
    of a 220 Hz sine)."""
    best = -200.0
    t_end = time.monotonic() + seconds
    while time.monotonic() < t_end:
        best = max(best, eng.snapshot()["peak_out_dbfs"][0])
        time.sleep(0.0005)
    return best


def max_step(y):
    return float(np.max(np.abs(np.diff(y.astype(np.float64), axis=0))))


def test_ten_edits_while_streaming_take_effect_without_a_step(tmp_path, jack_server):
    from livedyn.wavio import read_wav as read

    f = tmp_path / "mine.py"
    write(f, CURVE.format(v=0, thr=-30.0))
    eng = start_engine(f, record=tmp_path / "rec", attack=1.0, release=300.0)
    watcher = FileWatcher(eng, f, interval=0.05).start()
    thresholds = [-29.0 + 2 * i for i in range(10)]  # each edit: 1 dB less gain reduction
    try:
        stream_until(eng, 0.8)  # past the fade-in
        grs = []
        for i, thr in enumerate(thresholds):
            write(f, CURVE.format(v=i + 1, thr=thr))
            digest = hashlib.sha256(f.read_bytes()).hexdigest()[:12]
            assert wait_for(lambda: watcher.versions == i + 1, 30), \
                (i, watcher.last_error, eng.take_notices())
            assert eng.proc.algorithm.digest == digest
            stream_for(eng, 0.25)  # let the meters follow
            grs.append(eng.snapshot()["gain_reduction_db"])
        stats = eng.stats.copy()
        ring = eng.elring[:min(int(stats[cb.S_BLOCKS]), len(eng.elring))].copy()
        notices = eng.take_notices()
    finally:
        watcher.stop()
        eng.stop()
    # each version took effect: its gain reduction is the one its curve gives
    for thr, gr in zip(thresholds, grs):
        assert gr == pytest.approx(expected_gr(thr), abs=0.3), (thr, grs)
    assert int(stats[cb.S_SWAPS]) == 10
    assert sum("running" in t for lvl, t in notices if lvl == "info") == 10, notices
    # The swap blocks are counted and marked. What they cost in time is measured by
    # `livedyn bench swap` (a ratio within one run), not asserted here: a callback's wall-clock
    # time on a shared machine is the scheduler's as much as the swap's. Printed for the log.
    period = stats[cb.S_PERIOD_NS]
    swap_blocks = int(stats[cb.S_SWAP_BLOCKS])
    assert swap_blocks >= 10 * (480 // BS), swap_blocks
    print(f"swap blocks {swap_blocks}, flagged in them {stats[cb.S_SWAP_FLAGGED]}, late "
          f"{stats[cb.S_SWAP_LATE]}; whole run: {stats[cb.S_BLOCKS]} blocks, "
          f"{stats[cb.S_FLAGGED]} flagged, {stats[cb.S_LATE]} late")
    active = (ring[:, 2] >> cb.SWAP_BIT) & 1
    window = active.copy()
    window[1:] |= active[:-1]
    window[2:] |= active[:-2]
    flags = ring[:, 2] & ((1 << cb.SWAP_BIT) - 1)
    for b in np.flatnonzero(window & (flags != 0)):
        print(f"flagged swap block {b}: flags {flags[b]:#x}, callback {ring[b, 0] / period:.3f} "
              f"periods, started {ring[b, 1] / period:.2f} periods after the one before; "
              f"previous block {ring[b - 1, 0] / period:.3f} / {ring[b - 1, 1] / period:.2f}")
    swap_el = ring[window.astype(bool), 0]
    print(f"swap-window callback max {swap_el.max() / period:.3f} periods, median "
          f"{np.median(swap_el) / period:.3f}; elsewhere median "
          f"{np.median(ring[window == 0, 0]) / period:.3f}")
    # every swap ran both versions for its crossfade (10 ms = 7.5 blocks, so at least 7 each)
    assert int(np.count_nonzero(active)) >= 10 * 7, int(np.count_nonzero(active))

    # no step in the output beyond the bound derived in the module docstring
    y, _ = read(tmp_path / "rec" / "out.wav")
    x, _ = read(tmp_path / "rec" / "main.wav")
    y, x = y[int(0.7 * FS):], x[int(0.7 * FS):]
    n_xf = int(round(10.0 * FS / 1000))
    bound = max_step(x) + 2 * A / (n_xf + 1) + 1e-3
    assert max_step(y) <= bound, (max_step(y), bound)
    # the recording names the eleven versions and their values, and its automation loads
    versions = (tmp_path / "rec" / "versions.txt").read_text().splitlines()[1:]
    assert len(versions) == 11 and all(str(f) in v for v in versions)
    auto = livedyn.automation.Automation.load(tmp_path / "rec" / "automation.txt",
                                              load(f).schema)
    assert len([e for e in auto if e[0] > 0 and e[1] == "threshold"]) == 10
    # and the recording does show the ten versions: the level rises by about 1 dB per edit
    peaks = [float(np.max(np.abs(y[i:i + 4800]))) for i in range(0, len(y) - 4800, 4800)]
    assert 20 * np.log10(max(peaks) / min(peaks)) > 8.0


def test_a_switch_without_crossfade_breaks_the_bound(tmp_path, jack_server):
    """Negative control for the step bound: the same kind of swap with a one-sample fade."""
    from livedyn.wavio import read_wav as read

    f = tmp_path / "mine.py"
    write(f, CURVE.format(v=0, thr=-30.0))
    eng = start_engine(f, record=tmp_path / "rec", attack=1.0, release=300.0)
    try:
        stream_until(eng, 0.8)
        # three switches (a switch that lands near a zero crossing makes no step; three in a
        # row all doing so is unlikely, well under 1 %)
        for i, thr in enumerate((-10.0, -30.0, -10.0)):
            write(f, CURVE.format(v=i + 1, thr=thr))  # 10 dB less, then more, reduction
            eng.swap(load(f), xfade_ms=1000.0 / FS)
            stream_for(eng, 0.25)
    finally:
        eng.stop()
    y, _ = read(tmp_path / "rec" / "out.wav")
    x, _ = read(tmp_path / "rec" / "main.wav")
    y, x = y[int(0.7 * FS):], x[int(0.7 * FS):]
    bound = max_step(x) + 2 * A / (480 + 1) + 1e-3
    assert max_step(y) > 1.5 * bound, (max_step(y), bound)


BAD = {
    "syntax": ("PARAMS = ['threshold']\ndef gain_curve(x, p)\n    return 0.0\n",
               ["mine.py:2", "syntax error"]),
    "typing": ("PARAMS = ['threshold']\ndef gain_curve(x, p):\n    return 'dB' + x\n",
               ["mine.py:3", "does not compile in nopython mode"]),
    "nan": ("PARAMS = ['threshold']\ndef gain_curve(x, p):\n"
            "    return (x - p[P.threshold]) / 0.0 if x > p[P.threshold] else 0.0\n",
            ["not finite"]),
    "nan kernel": ("import math\nPARAMS = ['threshold']\ndef kernel(x, key, out, p, s):\n"
                   "    for n in range(x.shape[0]):\n        for c in range(x.shape[1]):\n"
                   "            out[n, c] = math.nan if x[n, c] > 0.9 else x[n, c]\n",
                   ["not finite"]),
    "boost": ("PARAMS = ['threshold']\ndef gain_curve(x, p):\n    return 6.0\n",
              ["+6.00 dB above makeup", "BOOST = True"]),
    "slow": ("import math\nPARAMS = ['threshold']\ndef gain_curve(x, p):\n"
             "    acc = 0.0\n    for i in range(4000):\n        acc += math.sin(x + i)\n"
             "    return min(0.0, -abs(acc) * 1e-30)\n",
             ["too slow for live use", "% of real time"]),
    "out of bounds": ("PARAMS = ['threshold']\nSTATE = ['a']\ndef detector(k, p, s):\n"
                      "    s[3] = abs(k)\n    return abs(k)\n",
                      ["detector reads or writes out of bounds"]),
}


def test_broken_versions_are_refused_and_the_old_one_keeps_playing(tmp_path, jack_server):
    f = tmp_path / "mine.py"
    write(f, CURVE.format(v=0, thr=-20.0))
    eng = start_engine(f)
    watcher = FileWatcher(eng, f, interval=0.05).start()
    running = eng.proc.algorithm.digest
    try:
        stream_until(eng, 0.6)
        for i, (what, (text, words)) in enumerate(BAD.items()):
            frames0 = int(eng.stats[cb.S_FRAMES])
            write(f, text)
            assert wait_for(lambda: watcher.failures == i + 1, 60), (what, watcher.last_error)
            msg = watcher.last_error
            assert "\n" not in msg
            for w in words:
                assert w in msg, (what, msg)
            notes = [t for lvl, t in eng.take_notices() if lvl == "error"]
            assert notes and "still running the previous version" in notes[-1]
            # the old version still runs, and the stream with it
            assert eng.proc.algorithm.digest == running
            assert eng.alive()
            assert wait_for(lambda: int(eng.stats[cb.S_FRAMES]) > frames0 + FS // 10, 2)
            assert peak_out(eng) == pytest.approx(20 * np.log10(A) - expected_gr(-20.0),
                                                  abs=1.0)
        # a good version after all that is taken
        write(f, CURVE.format(v=9, thr=-12.0))
        assert wait_for(lambda: watcher.versions == 1, 30), watcher.last_error
        assert int(eng.stats[cb.S_SWAPS]) == 1
    finally:
        watcher.stop()
        eng.stop()


GUARDED = '''
"""A kernel whose cost a parameter can raise past the block budget, or that can write NaN."""
import math

PARAMS = [Param("spin", "", 0, 1, 0, help="1: burn about 60 us per frame"),
          Param("poison", "", 0, 1, 0, help="1: write NaN")]


def kernel(x, key, out, p, s):
    acc = 0.0
    if p[P.spin] > 0.5:
        for n in range(x.shape[0]):
            for i in range(6000):
                acc += math.sin(i * 1e-3 + x[n, 0])
    bad = math.nan if p[P.poison] > 0.5 else 0.0
    for n in range(x.shape[0]):
        for c in range(x.shape[1]):
            out[n, c] = 0.5 * x[n, c] + bad + acc * 1e-300
'''


def test_the_overrun_guard_bypasses_a_kernel_that_is_too_slow_live(tmp_path, jack_server):
    from livedyn.wavio import read_wav as read

    f = tmp_path / "spin.py"
    write(f, GUARDED)
    eng = start_engine(f, record=tmp_path / "rec")
    try:
        stream_until(eng, 0.7)
        assert eng.guard_tripped() is None
        out_before = peak_out(eng)
        assert out_before == pytest.approx(20 * np.log10(A * 0.5), abs=0.3)  # the kernel's -6 dB
        eng.set("spin", 1)
        assert wait_for(lambda: eng.guard_tripped() is not None, 5)
        msg = eng.guard_tripped()
        assert "bypassed, the stream goes on" in msg and "\n" not in msg
        stream_for(eng, 0.3)
        frames0 = int(eng.stats[cb.S_FRAMES])
        assert wait_for(lambda: int(eng.stats[cb.S_FRAMES]) > frames0 + FS // 4, 3)
        assert eng.alive()
        # bypassed: the dry signal, at its own level
        assert peak_out(eng) == pytest.approx(20 * np.log10(A), abs=0.3)
        assert int(eng.stats[cb.S_GUARD_TRIPS]) == 1
        assert any("overran the block budget" in t for _, t in eng.take_notices())
        # after the fix, a fresh instance is crossfaded in from the dry signal
        eng.set("spin", 0)
        info = eng.reset_guard()
        assert info is not None and eng.guard_tripped() is None
        stream_for(eng, 0.3)
        assert peak_out(eng) == pytest.approx(out_before, abs=0.3)
    finally:
        eng.stop()
    # neither the way into the bypass nor the way back made a step: the bound of the module
    # docstring with the guard's shorter fade (5 ms, N = 240)
    y, _ = read(tmp_path / "rec" / "out.wav")
    x, _ = read(tmp_path / "rec" / "main.wav")
    y, x = y[int(0.6 * FS):-int(0.1 * FS)], x[int(0.6 * FS):-int(0.1 * FS)]
    bound = max_step(x) + 2 * A / (240 + 1) + 1e-3
    assert max_step(y) <= bound, (max_step(y), bound)


def test_the_key_monitor_plays_a_user_kernels_key(tmp_path, jack_server):
    from livedyn.wavio import read_wav as read

    f = tmp_path / "k.py"
    write(f, GUARDED)
    eng = start_engine(f, record=tmp_path / "rec")
    try:
        eng.monitor("key")
        stream_until(eng, 1.0)
    finally:
        eng.stop()
    y, _ = read(tmp_path / "rec" / "out.wav")
    x, _ = read(tmp_path / "rec" / "main.wav")
    # the key is the main input here: after the fade-in the output is the input itself, and
    # not a block of it repeated
    a, b = int(0.6 * FS), int(0.9 * FS)
    np.testing.assert_allclose(y[a:b], x[a:b], atol=1e-6)


def test_a_user_kernel_writing_nan_is_caught_by_the_last_stage(tmp_path, jack_server):
    f = tmp_path / "nan.py"
    write(f, GUARDED)
    eng = start_engine(f)
    try:
        stream_until(eng, 0.7)
        assert eng.snapshot()["nonfinite_blocks"] == 0
        seq = eng.set("poison", 1)
        assert eng.wait_applied(seq) is not None
        stream_for(eng, 0.2)
        snap = eng.snapshot()
        assert snap["nonfinite_blocks"] > 10
        assert snap["peak_out_dbfs"][0] <= -199  # muted blocks, not NaN on the wire
        assert eng.alive()
    finally:
        eng.stop()


def test_bench_swap_reports_the_swap_blocks_apart_from_the_others(tmp_path):
    """``livedyn bench swap`` on its own headless server: what it counts is asserted; what it
    times (the swap blocks' callback against the others') is the bench's figure to report."""
    import json
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parent.parent
    out = tmp_path / "swap.json"
    r = subprocess.run([str(Path(sys.executable).parent / "livedyn"), "bench", "swap",
                        "--swaps", "3", "--json", str(out)], capture_output=True, text=True,
                       timeout=300, cwd=root)
    assert r.returncode == 0, r.stderr
    s = json.loads(out.read_text())["swap"]
    assert s["algorithm"] == "compressor" and s["swaps"] == 3
    # each swap ran both versions for at least its 10 ms crossfade (7.5 blocks of 64 frames)
    assert s["swap_blocks"] >= 3 * 7 and s["other_blocks"] > 100
    sw, other = s["swap_callback"], s["other_callback"]
    assert 0 < sw["median"] <= sw["p99"] <= sw["max"]
    assert 0 < other["median"] <= other["p99"] <= other["max"]
    assert s["median_ratio"] == pytest.approx(sw["median"] / other["median"])
    assert "3 swaps" in r.stdout and "ratio" in r.stdout
