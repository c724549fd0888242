"""The documented definitions hold exactly: the limiter's release (a one-pole in dB) and attack
(a linear-gain ramp), the gate's start state, the expander's hysteresis step, the mean link.

Each check compares the kernel with an independent model in tests/reference.py, written from
the definition named beside it (the README's "Parameters" section unless said otherwise).
"""
import numpy as np
import pytest

import livedyn
from livedyn.params import ParamError

from .reference import (db, expander_with_hysteresis_gain, linear_ramp_gain, one_pole_db_step,
                        square)

FS = 48000


@pytest.mark.parametrize("release", [20.0, 80.0, 400.0])
def test_limiter_release_is_a_one_pole_in_db(release):
    # README: release is a one-pole time constant tau; the limiter's acts on the gain in dB.
    # Lookahead 0 and attack 0 make the requirement the release's own target at once.
    hi, lo, n = 10 ** (11 / 20), 10 ** (-21 / 20), 4000
    m = 3 * int(release * FS / 1000)
    x = np.concatenate([square(FS, hi, n), square(FS, lo, m)])
    p = livedyn.Processor("limiter", FS, 1, ceiling=-1, lookahead=0, attack=0, release=release)
    _, tr = p.process_traced(x)
    g = tr["gain_db"][:, 0]
    g0 = g[n - 1]
    np.testing.assert_allclose(g0, -1 - db(np.float32(hi)), atol=1e-9)
    want = one_pole_db_step(g0, 0.0, release, FS, m)
    np.testing.assert_allclose(g[n:], want, atol=1e-9)
    # 63 % of the dB recovery at tau, to a sample
    k = int(np.argmax(g[n:] >= g0 * np.exp(-1.0))) + 1
    assert abs(k - release * FS / 1000) <= 1


@pytest.mark.parametrize("attack,lookahead", [(5.0, 5.0), (2.0, 5.0), (0.5, 1.0)])
def test_limiter_attack_is_a_linear_gain_ramp(attack, lookahead):
    # README: the limiter's attack is a straight ramp of the linear gain over attack ms (A
    # samples, reached A + 1 samples after it starts), starting when the peak enters the
    # lookahead, so it is complete lookahead - attack ms before the peak leaves.
    n = 2000
    x = np.concatenate([square(FS, 0.1, n), square(FS, 2.0, n)])
    p = livedyn.Processor("limiter", FS, 1, ceiling=-1, lookahead=lookahead, attack=attack,
                          release=50)
    y, tr = p.process_traced(x)
    g_lin = 10 ** (tr["gain_db"][:, 0] / 20)
    r = 10 ** (-1 / 20) / 2.0  # 2.0 is exact in float32
    a = int(round(attack * FS / 1000))
    np.testing.assert_allclose(g_lin[:n], 1.0, atol=1e-12)
    np.testing.assert_allclose(g_lin[n:n + 4 * a], linear_ramp_gain(r, a + 1, 4 * a),
                               atol=1e-12)
    # the first loud sample leaves lookahead samples after it entered, at the full reduction
    d = int(round(lookahead * FS / 1000))
    assert abs(y[n + d, 0]) <= 10 ** (-1 / 20) * (1 + 2 ** -23)


def test_measure_timing_reports_the_limiter_under_its_definitions():
    from livedyn import analysis

    rows = analysis.timing(lambda: livedyn.Processor("limiter", FS, 1, attack=5, lookahead=5,
                                                     release=80))
    att, rel = rows
    assert att.law == "linear ramp" and abs(att.ramp_ms - (5 + 1000 / FS)) < 1e-6
    assert rel.law == "one-pole" and abs(rel.hold_ms - 5.0) < 0.05
    rows = analysis.timing(lambda: livedyn.Processor("limiter", FS, 1, attack=0, lookahead=5,
                                                     release=80))
    assert abs(rows[1].tau_ms - 80.0) < 0.05


def test_gate_timing_reports_hold_and_release_separately():
    from livedyn import analysis

    rows = analysis.timing(lambda: livedyn.Processor("gate", FS, 1, hold=50, release=80,
                                                     attack=0.5))
    rel = [r for r in rows if r.phase == "release"][0]
    assert abs(rel.hold_ms - 50.0) < 0.05
    assert abs(rel.tau_ms - 80.0) < 0.05


@pytest.mark.parametrize("algo", ["gate", "expander"])
def test_start_state_closed_by_default_and_open_on_request(algo):
    # README: expander and gate start closed (the state after silence) unless start = open.
    x = square(FS, 10 ** (-100 / 20), 4800)  # far below threshold from the first sample
    closed = livedyn.Processor(algo, FS, 1, range=40)
    _, tr = closed.process_traced(x)
    assert tr["gain_db"][0, 0] == -40.0 and tr["gain_db"][-1, 0] == -40.0
    opened = livedyn.Processor(algo, FS, 1, range=40, start="open")
    _, tr = opened.process_traced(x)
    assert tr["gain_db"][0, 0] > -1.0  # starts at unity gain and closes with release
    with pytest.raises(ParamError, match="start = 'ajar': expected one of closed, open"):
        opened.set("start", "ajar")


def test_expander_hysteresis_steps_the_gain_by_ratio_minus_one_times_hysteresis():
    # README: with hysteresis h the expander stays open down to T - h, then its threshold
    # returns to T, so the static gain steps by (R - 1) h at the closing point: 18 dB for
    # R 4, h 6. The curve trace against the independent model, on a slow falling ramp.
    T, R, h = -40.0, 4.0, 6.0
    levels = np.linspace(-30.0, -55.0, 2500)
    amp = 10 ** (np.repeat(levels, 96) / 20)
    x = square(FS, 1.0, len(amp)) * amp[:, None].astype(np.float32)
    p = livedyn.Processor("expander", FS, 1, threshold=T, ratio=R, hysteresis=h, knee=0,
                          range=60, attack=0, release=1, hold=0)
    _, tr = p.process_traced(x)
    curve = tr["curve_db"][:, 0]
    state, want = True, []
    for v in tr["detector_db"][:, 0]:
        state, g = expander_with_hysteresis_gain(v, T, R, h, 60.0, state)
        want.append(g)
    np.testing.assert_allclose(curve, want, atol=1e-6)
    step = np.min(np.diff(curve))
    assert abs(step - (-(R - 1) * h)) < 0.5  # the 18 dB step, to the ramp's resolution


def test_mean_link_averages_the_linear_detector_levels():
    # README: link = mean averages the channels' linear detector levels (|k| for peak).
    a, b = 0.5, 0.05
    x = np.concatenate([square(FS, a, 9600), square(FS, b, 9600)], axis=1)
    p = livedyn.Processor("compressor", FS, 2, link="mean", threshold=-30, ratio=4, knee=0,
                          attack=0)
    _, tr = p.process_traced(x)
    level = db(np.float32(a) / 2 + np.float32(b) / 2)
    assert abs(tr["detector_db"][-1, 0] - level) < 1e-6
