"""Property tests (hypothesis): random in-range settings and signals.

For every built-in: finite output, no gain above makeup, identical output whatever the block
split, and no subnormal number in any state. Common practice, no source: these are the
invariants a dynamics processor must keep whatever it is fed.
"""
import math

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import livedyn
from livedyn import algorithms

from .test_dynamics import subnormal_count

SETTINGS = settings(max_examples=25, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def draw_params(data, algo, fs):
    values = {}
    for prm in algorithms.get(algo).schema:
        if prm.name in ("key",):
            continue
        if prm.taper == "choice":
            choices = list(prm.choices)
            if algo == "limiter" and prm.name == "link":
                choices = ["max", "none"]
            values[prm.name] = data.draw(st.sampled_from(choices), label=prm.name)
        elif prm.off_value is not None:
            on = data.draw(st.booleans(), label=prm.name + "_on")
            hi = min(prm.hi, fs / 2 * 0.9)
            values[prm.name] = data.draw(st.floats(prm.lo, hi), label=prm.name) if on else 0.0
        elif prm.taper == "slope":
            values[prm.name] = data.draw(
                st.one_of(st.just(math.inf), st.floats(1.0, 100.0)), label=prm.name)
        else:
            values[prm.name] = data.draw(st.floats(prm.lo, prm.hi), label=prm.name)
    return values


def signal(data, frames, channels):
    seed = data.draw(st.integers(0, 2**31), label="seed")
    rng = np.random.default_rng(seed)
    kind = data.draw(st.sampled_from(["noise", "bursts", "sine", "silence-after-loud"]))
    t = np.arange(frames)
    if kind == "noise":
        x = rng.standard_normal((frames, channels)) * 10 ** (rng.uniform(-60, 0) / 20)
    elif kind == "bursts":
        env = np.repeat(10 ** (rng.uniform(-80, 6, frames // 50 + 1) / 20), 50)[:frames]
        x = rng.standard_normal((frames, channels)) * env[:, None]
    elif kind == "sine":
        f = rng.uniform(20, 20000)
        x = np.sin(2 * np.pi * f * t[:, None] / 48000 + rng.uniform(0, 6, channels)[None, :])
    else:
        x = np.zeros((frames, channels))
        x[: frames // 4] = rng.standard_normal((frames // 4, channels))
    return x.astype(np.float32)


@SETTINGS
@given(data=st.data())
def test_random_settings_keep_the_invariants(data):
    algo = data.draw(st.sampled_from(algorithms.names()), label="algorithm")
    fs = data.draw(st.sampled_from([44100, 48000, 96000]), label="fs")
    ch = data.draw(st.integers(1, 3), label="channels")
    params = draw_params(data, algo, fs)
    if params.get("topology") == "feedback" and algo == "compressor":
        from livedyn.params import feedback_problem

        if feedback_problem(params["ratio"], params["attack"], params["release"], fs):
            params["topology"] = "feedforward"  # outside the feedback law's reachable range
    kch = 0
    kw = {}
    if algo == "ducker":
        kch = data.draw(st.sampled_from([1, ch]), label="key_channels")
        kw = {"key_channels": kch, "key": "external"}
    frames = 3000
    x = signal(data, frames, ch)
    key = signal(data, frames, kch) if kch else None
    ref = livedyn.Processor(algo, fs, ch, **kw, **params)
    y_ref, tr = ref.process_traced(x, key)
    assert np.all(np.isfinite(y_ref))
    # no gain above makeup (the makeup and automakeup the processor reports)
    makeup = params.get("makeup", 0.0)
    auto = float(ref.st[17, 0])
    assert np.all(tr["total_gain_db"] <= makeup + auto + 1e-9)
    assert subnormal_count(ref.st) == 0 and subnormal_count(ref.ring) == 0
    # block-size invariance
    bs = data.draw(st.sampled_from([1, 7, 64, 1024, 4097]), label="blocksize")
    p = livedyn.Processor(algo, fs, ch, **kw, **params)
    parts = []
    for i in range(0, frames, bs):
        parts.append(p.process(x[i:i + bs], None if key is None else key[i:i + bs]))
    np.testing.assert_array_equal(np.concatenate(parts), y_ref)
