"""Regression tests for faults found in review of the fused kernels.

1. limiter: a change of ``link`` mid-stream broke the ceiling (the moving average and queue of
   the new gain channels were never built) and left a channel's gain at or below 0;
2. limiter: switching ``true_peak`` read the requirement ring out of bounds during the delay
   crossfade (a short lookahead, the write position near the end of the ring);
3. gate: the ratio slot it does not use made the parameter glide NaN, so it never finished;
4. compressor and limiter: a lookahead change during a running crossfade dropped the
   half-faded delay tap (a step in the output);
5. compressor, linear-domain decoupled detector: ``hold`` was ignored.

and two checks of the fixes: structure changes of the limiter under loud noise keep its ceiling,
and lookahead changes that wait for a running crossfade start at the same sample whatever the
block size.

Sources of the checks
---------------------
* Ceiling: the limiter's design guarantee (``livedyn.dsp.limiter`` module docstring: no output
  sample passes the ceiling), with the float32 rounding of the output allowed
  (ceiling * (1 + 2**-23)); the same form as tests/test_limiter.py.
* Bit-identical output whatever the block size: the project's kernel contract (DEVELOPERS.md,
  "The kernel contract"). Block sizes 1, 63, 4097: common practice, no source.
* Hold: the parameter's own definition (``livedyn.params``: "time gain is held after the
  detector stops asking for change, before release"); hold is not part of Giannoulis, Massberg
  and Reiss (2012), eq. (17), whose decoupled detector it extends (common practice, no source).
* A crossfade between delay taps changes the output smoothly: common practice, no source; the
  bound 1.5 x the largest sample-to-sample step of the input sine is a rule of thumb.
* Everything else (gain bounds after a link change, glide end after 1 s = 100 glide time
  constants) is stated beside the check and derived from the documented time constants.
"""
from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

import livedyn
from livedyn.automation import run_with_automation
from livedyn.dsp import layout as L
from livedyn.params import P_RATIO, P_THRESHOLD

FS = 48000
F32_ULP = 2.0 ** -23
ROOT = Path(__file__).resolve().parents[1]


def run(proc, x, events=(), blocksize=256, key=None):
    """Process x through proc in blocks, applying (frame, name, value) events at their frames."""
    return run_with_automation(proc.process, proc.set, x, key, list(events), blocksize)


def noise_bursts(seed, frames, channels, peak_db):
    """Gaussian noise in bursts of 5-50 ms, burst rms from -40 dB to peak_db - 10 dB (peaks
    near peak_db), with gaps of silence and isolated full-height spikes."""
    rng = np.random.default_rng(seed)
    x = np.zeros((frames, channels))
    i = 0
    while i < frames:
        n = int(rng.integers(int(0.005 * FS), int(0.05 * FS)))
        if rng.random() < 0.8:
            level = 10 ** (rng.uniform(-40.0, peak_db - 10.0) / 20)
            x[i:i + n] = rng.standard_normal((min(n, frames - i), channels)) * level
        i += n + int(rng.integers(0, int(0.01 * FS)))
    idx = rng.integers(0, frames, 30)
    x[idx] = rng.choice([-1.0, 1.0], (30, channels)) * 10 ** (peak_db / 20)
    return x.astype(np.float32)


def effective_gain(y, x, delay, c, amp):
    """y / x(delayed) on channel c where the delayed input is at least half its amplitude;
    NaN elsewhere (near zero crossings the ratio says nothing)."""
    xd = np.zeros(len(x))
    xd[delay:] = x[:len(x) - delay, c]
    g = np.full(len(x), np.nan)
    ok = np.abs(xd) >= 0.5 * amp
    g[ok] = y[ok, c] / xd[ok]
    return g


# ---- 1. limiter: link changed mid-stream ---------------------------------------------------

@pytest.mark.parametrize("loud", [0, 1])
def test_limiter_link_change_keeps_ceiling_and_gains(loud):
    # One channel a 997 Hz sine 20 dB over the ceiling (required gain 0.1), the other a quiet
    # 1499 Hz sine at 0.3 x ceiling (required gain 1). link max -> none -> max. The changes sit
    # 200 frames after a multiple of 4096, so the limiter's periodic exact re-sum of its moving
    # average (every 4096 frames) is 81 ms away and cannot hide a missing rebuild.
    ceil_db, release_ms = -6.0, 20.0
    ceil = 10 ** (ceil_db / 20)
    n = int(0.6 * FS)
    t = np.arange(n) / FS
    quiet = 1 - loud
    amp = np.zeros(2)
    amp[loud], amp[quiet] = 10 * ceil, 0.3 * ceil
    x = np.zeros((n, 2))
    x[:, loud] = amp[loud] * np.sin(2 * np.pi * 997 * t)
    x[:, quiet] = amp[quiet] * np.sin(2 * np.pi * 1499 * t + 0.3)
    x = x.astype(np.float32)
    f1, f2 = 2 * 4096 + 200, 4 * 4096 + 200
    proc = livedyn.Processor("limiter", FS, 2, ceiling=ceil_db, lookahead=5, attack=5,
                             release=release_ms, link="max")
    d = proc.latency_samples
    y = run(proc, x, [(f1, "link", "none"), (f2, "link", "max")])

    assert np.isfinite(y).all()
    assert np.abs(y).max() <= ceil * (1 + F32_ULP)  # limiter design guarantee
    g = [effective_gain(y, x, d, c, amp[c]) for c in range(2)]
    # 3 release time constants; the release is a one-pole in dB (README "Definitions"), so
    # from 0.1 (-20 dB) the gain is back to 10^(-20 e^-3 / 20) = 0.892 by then
    settle = int(0.06 * FS)
    # Bound 1: no channel's gain ever falls below half the smallest requirement (0.1) once the
    # first lookahead has passed: a rebuild may restart from the smallest requirement, never 0.
    for c in range(2):
        assert np.nanmin(g[c][2 * d:]) >= 0.05, f"channel {c} gain collapsed"
    # Bound 2: unlinked, the quiet channel is back above 0.89 within 60 ms of the change ...
    assert np.nanmin(g[quiet][f1 + settle:f2]) >= 0.89
    # ... and linked again, it follows the loud channel (0.1, not 1).
    assert np.nanmax(g[quiet][f2 + d + 1:]) <= 0.11
    assert np.nanmax(g[loud][f1:]) <= 0.11


# ---- 2. limiter: true_peak switched, bounds-checked ----------------------------------------

BOUNDS_SCRIPT = textwrap.dedent("""
    import numpy as np, livedyn
    from livedyn.automation import run_with_automation
    FS = 48000
    rng = np.random.default_rng(3)
    x = (rng.standard_normal((7000, 2)) * 3.0).astype(np.float32)
    worst = 0.0
    for look in (0.0, 0.1, 5.0):
        p = livedyn.Processor("limiter", FS, 2, ceiling=-1.0, lookahead=look, attack=look)
        # ring length 986 at 48 kHz: toggles every 300 frames (some inside the 480-frame
        # crossfade the previous one started, some after it) put crossfades over every
        # write position, the end of the ring included
        ev = [(f, "true_peak", "on" if k % 2 == 0 else "off")
              for k, f in enumerate(range(300, 6600, 300))]
        y = run_with_automation(p.process, p.set, x, None, ev, 128)
        assert np.isfinite(y).all()
        worst = max(worst, float(np.abs(y).max()) / 10 ** (-1.0 / 20))
    print("WORST", repr(worst))
""")


def test_limiter_true_peak_switch_stays_in_bounds(tmp_path):
    # numba bounds checking (NUMBA_BOUNDSCHECK=1) turns an out-of-bounds ring read into an
    # IndexError; a cache folder of its own keeps the checked build out of the normal cache.
    env = dict(os.environ, NUMBA_BOUNDSCHECK="1", NUMBA_CACHE_DIR=str(tmp_path / "cache"),
               PYTHONPATH=str(ROOT))
    res = subprocess.run([sys.executable, "-c", BOUNDS_SCRIPT], cwd=ROOT, env=env,
                         capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr[-2000:]
    worst = float(res.stdout.split("WORST")[1])
    assert worst <= 1 + F32_ULP  # limiter design guarantee, relative to the ceiling


# ---- 3. gate: the glide finishes -----------------------------------------------------------

GLIDED = (L.S_THR, L.S_SLOPE, L.S_KNEE, L.S_MAKEUP, L.S_RANGE, L.S_MIX, L.S_CEIL, L.S_HYST)


def _glide_settled(proc, p, x):
    """Run 1 s after a parameter change (100 glide time constants of 10 ms), then one more
    block: every smoothed slot must have stopped moving, with no NaN in the state."""
    st, ring = proc.st, proc.ring
    out = np.empty_like(x[:480])
    for i in range(0, FS, 480):
        proc._kernel(x[i:i + 480], x[i:i + 480], out, p, st, ring, proc._no_trace)
    before = st[list(GLIDED), 0].copy()
    proc._kernel(x[:480], x[:480], out, p, st, ring, proc._no_trace)
    assert not np.isnan(st).any()
    assert np.array_equal(st[list(GLIDED), 0], before)  # glide finished: nothing moves
    assert np.isfinite(out).all()


def test_gate_glide_finishes_after_a_change():
    rng = np.random.default_rng(1)
    x = (0.1 * rng.standard_normal((FS, 2))).astype(np.float32)
    proc = livedyn.Processor("gate", FS, 2)
    proc.process(x[:4800])
    proc.set("threshold", -30)
    proc.set("range", 40)
    proc.set("hysteresis", 2)
    _glide_settled(proc, proc.p, x)
    # the slots the gate has controls for sit exactly on their targets
    assert proc.st[L.S_THR, 0] == -30.0
    assert proc.st[L.S_RANGE, 0] == 40.0
    assert proc.st[L.S_HYST, 0] == 2.0
    assert proc.st[L.S_MIX, 0] == 1.0


def test_dynamics_kernel_with_no_ratio_slot_glides_to_an_end():
    # An algorithm without a ratio control may leave the slot at 0 (ratio below 1 = no ratio).
    rng = np.random.default_rng(2)
    x = (0.1 * rng.standard_normal((FS, 2))).astype(np.float32)
    proc = livedyn.Processor("gate", FS, 2)
    p = proc.p.copy()
    p[P_RATIO] = 0.0
    _glide_settled(proc, p, x)
    p[P_THRESHOLD] = -35.0  # a change: the glide must end again
    _glide_settled(proc, p, x)
    assert proc.st[L.S_THR, 0] == -35.0


# ---- 4. lookahead changed during a running crossfade ---------------------------------------

@pytest.mark.parametrize("algorithm,settings", [
    ("compressor", dict(ratio=1.0)),
    ("limiter", dict(ceiling=0.0, attack=0.0)),
], ids=["compressor", "limiter"])
def test_lookahead_change_inside_crossfade_does_not_click(algorithm, settings):
    # 73 Hz sine at 0.5 through a processor that applies unity gain (ratio 1; a limiter whose
    # ceiling the sine never reaches): only the delay line acts. Lookahead 0 -> 10 ms, and
    # back to 0 ms 5 ms later, in the middle of the 10 ms crossfade the first change started.
    n = int(0.2 * FS)
    s = 0.5 * np.sin(2 * np.pi * 73 * np.arange(n) / FS)
    x = np.stack([s, s], 1).astype(np.float32)
    proc = livedyn.Processor(algorithm, FS, 2, lookahead=0, **settings)
    f1 = 4800
    f2 = f1 + int(0.005 * FS)
    y = run(proc, x, [(f1, "lookahead", 10), (f2, "lookahead", 0)], blocksize=64)
    step_in = np.abs(np.diff(x[:, 0].astype(float))).max()
    step_out = np.abs(np.diff(y[:, 0].astype(float))).max()
    assert step_out <= 1.5 * step_in, f"largest step {step_out:.4g} vs sine {step_in:.4g}"
    # the delay ends where the last change put it, and the sine passes unchanged again
    assert proc.st[L.S_DCUR, 0] == 0 and proc.st[L.S_XF, 0] == 0
    assert np.array_equal(y[-1000:], x[-1000:])


# ---- 5. linear-domain decoupled detector with hold -----------------------------------------

def test_linear_decoupled_detector_holds():
    # A step from 0.3 down to 0.001 (-10.5 to -60 dBFS) through a compressor (threshold -30,
    # ratio 4, hard knee) whose detector runs in the linear domain with the decoupled
    # (eq. (17)) ballistics. With hold = 50 ms the gain must stay where it was for 50 ms after
    # the fall, then release; with hold = 0 it releases at once.
    n = int(0.4 * FS)
    fall = int(0.2 * FS)
    x = np.full((n, 1), 0.001, np.float32)
    x[:fall] = 0.3
    hold_ms = 50.0
    hold_n = int(hold_ms * FS / 1000)
    gains = {}
    for hold in (hold_ms, 0.0):
        proc = livedyn.Processor("compressor", FS, 1, threshold=-30, ratio=4, knee=0,
                                 attack=1, release=20, hold=hold, domain="linear",
                                 ballistics="decoupled")
        _, tr = proc.process_traced(x)
        gains[hold] = tr["gain_db"][:, 0]
    g = gains[hold_ms]
    g0 = g[fall - 1]
    assert g0 < -10.0  # it was compressing: about -(1 - 1/4)(-10.5 + 30) = -14.6 dB
    held = g[fall:fall + hold_n - 1]
    assert np.abs(held - g0).max() <= 1e-6  # held (dB)
    after = fall + hold_n + int(0.005 * FS)
    assert g[after] > g0 + 1.0  # released after the hold
    assert gains[0.0][fall + int(0.005 * FS)] > g0 + 1.0  # without hold: released at once


# ---- the fixes under load ------------------------------------------------------------------

def test_limiter_structure_changes_under_loud_noise_keep_ceiling():
    # Noise bursts peaking 20 dB over the ceiling; every 3 blocks of 256 one of lookahead,
    # attack, true_peak and link changes (seeded), many of them while a delay crossfade from
    # an earlier change still runs.
    ceil_db = -6.0
    x = noise_bursts(21, int(1.5 * FS), 2, ceil_db + 20.0)
    proc = livedyn.Processor("limiter", FS, 2, ceiling=ceil_db, lookahead=5, attack=2)
    rng = np.random.default_rng(8)
    events = []
    for k, f in enumerate(range(768, len(x) - FS // 10, 768)):
        what = k % 4
        if what == 0:
            events.append((f, "lookahead", float(rng.uniform(0, 20))))
        elif what == 1:
            events.append((f, "attack", float(rng.uniform(0, 20))))
        elif what == 2:
            events.append((f, "true_peak", "on" if rng.random() < 0.5 else "off"))
        else:
            events.append((f, "link", "none" if rng.random() < 0.5 else "max"))
    y = run(proc, x, events)
    assert np.isfinite(y).all()
    assert np.abs(y).max() <= 10 ** (ceil_db / 20) * (1 + F32_ULP)  # design guarantee
    # every change has taken effect by the end (the last one 0.1 s before it)
    assert proc.st[L.S_DCUR, 0] == proc.latency_samples and proc.st[L.S_XF, 0] == 0


REPLAY_EVENTS = {
    # two lookahead changes 233 frames (4.9 ms) apart, then a third inside the crossfade the
    # waiting second one starts, and a fourth inside the crossfade the third one starts
    "compressor": [(2001, "lookahead", 5), (2234, "lookahead", 12), (2600, "lookahead", 2),
                   (3100, "lookahead", 0), (3150, "threshold", -30)],
    "limiter": [(2001, "lookahead", 5), (2234, "lookahead", 12), (2300, "true_peak", "on"),
                (2600, "lookahead", 2), (2650, "link", "none"), (3100, "lookahead", 0.1),
                (3101, "attack", 0.05), (4000, "true_peak", "off"), (4100, "link", "max")],
}


@pytest.mark.parametrize("algorithm", ["compressor", "limiter"])
def test_waiting_lookahead_change_is_block_size_independent(algorithm):
    # The waiting changes must start at the sample the running crossfade ends on, not at the
    # next block boundary: replay at block sizes 1, 63 and 4097 must give the same bytes.
    x = noise_bursts(5, 8000, 2, 6.0)
    outs = {}
    for bs in (4097, 63, 1):
        proc = livedyn.Processor(algorithm, FS, 2, ceiling=-3.0)
        outs[bs] = run(proc, x, REPLAY_EVENTS[algorithm], blocksize=bs)
        assert proc.st[L.S_DCUR, 0] == proc.latency_samples
    assert outs[63].tobytes() == outs[4097].tobytes(), "blocksize 63 differs from 4097"
    assert outs[1].tobytes() == outs[4097].tobytes(), "blocksize 1 differs from 4097"


def test_limiter_design_not_clamp_holds_ceiling_during_lookahead_increase():
    # The limiter docstring: the last clamp only absorbs rounding (S_CLAMP counts cuts
    # > 1e-9 relative), so tests can show the design holds the ceiling. Lookahead and attack
    # 1 -> 5 ms, one spike 20 dB over the ceiling 300 frames into the 480-frame crossfade.
    x = np.full((30000, 1), 0.01, np.float32)
    x[20300] = 5.0
    proc = livedyn.Processor("limiter", FS, 1, ceiling=-6, lookahead=1, attack=1)
    y = run(proc, x, [(20000, "lookahead", 5), (20000, "attack", 5)])
    assert np.abs(y).max() <= 10 ** (-6 / 20) * (1 + F32_ULP)
    assert proc.st[L.S_CLAMP, 0] == 0
