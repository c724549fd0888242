"""Automation replayed through the processors: output must not depend on the block size.

A sample-stamped automation file (steps and ramps of every kind of control) is replayed with
:func:`livedyn.automation.run_with_automation` through a :class:`livedyn.Processor` on noise
bursts, at several block sizes, and through ``livedyn render --automation``.

Sources of the checks
---------------------
* Bit-identical output whatever the block size a caller splits a signal into: the project's
  kernel contract (DEVELOPERS.md, "The kernel contract"), i.e. a live run at 64 frames and an
  offline render at 4097 frames must produce the same samples. Block sizes 1 (every sample a
  block), 63 and 64 (a typical live period and its neighbour), 4097 and 8192 (offline sizes,
  one of them odd) are common practice, no source.
* An event stamped at frame F is in force from frame F on, and nothing changes before the first
  event: the automation format's own specification (``livedyn.automation`` module docstring).
"""
from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf

import livedyn
from livedyn import cli
from livedyn.automation import Automation, run_with_automation

FS = 48000
SECONDS = 3.0
# blocksize 1 goes through Python once per sample (about 10 us a call), so it is compared on
# the first part of the signal only; the schedules below put events of every kind in it.
FIRST = int(0.75 * FS)
BLOCKSIZES = (63, 64, 4097, 8192)
REFERENCE_BLOCKSIZE = 4097


def noise_bursts(seed, channels, seconds=SECONDS, fs=FS):
    """Noise bursts of 20-150 ms at levels from -60 to 0 dBFS with gaps of silence between.

    Every channel gets its own noise so that linked detection has something to pick from.
    """
    rng = np.random.default_rng(seed)
    n = int(seconds * fs)
    x = np.zeros((n, channels), np.float32)
    pos = int(rng.integers(0, int(0.01 * fs)))
    while pos < n:
        length = int(rng.uniform(0.02, 0.15) * fs)
        amp = 10 ** (rng.uniform(-60.0, 0.0) / 20)
        end = min(n, pos + length)
        burst = rng.uniform(-1.0, 1.0, (end - pos, channels)) * amp
        x[pos:end] = burst.astype(np.float32)
        pos = end + int(rng.uniform(0.0, 0.08) * fs)
    return x


# Schedules: ramps over the first part (so that blocksize 1 covers them), steps at odd frames
# that no block size divides, and a second round of changes later in the signal.
COMMON_STEPS = """\
9001     release   20
12345    makeup    6
15013    mix       50
20011    lookahead 5
27001    release   600
31337    makeup    -3 dB
40009    lookahead 0.5
50021    mix       100 %
70001    release   5
80021    lookahead 20
95003    makeup    0
110017   lookahead 0
"""

SCHEDULES = {
    "compressor": """\
2400..26400   threshold -40 -> 0
4801..30001   ratio     1 -> inf
7203..33007   knee      0 -> 12
1001..36013   attack    0 -> 200
60007  threshold -30
90001  ratio     3:1
100003 knee      0
105001 attack    1
115001 detector  rms
125003 detector  peak
""",
    "expander": """\
2400..26400   threshold -40 -> 0
4801..30001   ratio     1 -> inf
7203..33007   knee      0 -> 12
1001..36013   attack    0 -> 200
17777  range      60
21001  hysteresis 6
60007  threshold  -30
90001  ratio      2
100003 knee       3
105001 attack     0.5
112001 hold       100
""",
    "gate": """\
2400..26400   threshold -40 -> 0
1001..36013   attack    0 -> 200
17777  range      80
21001  hysteresis 10
23003  hold       40
60007  threshold  -35
105001 attack     0.2
112001 hold       0
""",
    "ducker": """\
2400..26400   threshold -40 -> 0
4801..30001   ratio     1 -> inf
7203..33007   knee      0 -> 12
1001..36013   attack    0 -> 200
17777  range      24
23003  hold       10
25013  key_hpf    200
60007  threshold  -45
90001  ratio      inf
105001 attack     2
115001 key_hpf    off
""",
}

# The limiter has its own controls: ceiling, attack, release, hold, lookahead, true_peak, link.
LIMITER_SCHEDULE = """\
2400..26400   ceiling  -20 -> 0
1001..30013   attack   0 -> 200
3001..28001   release  1 -> 300
5003   hold      10
9001   lookahead 2
13001  true_peak on
19001  hold      5
22003  link      none
33001  lookahead 10
45007  true_peak off
60007  ceiling   -6
70001  attack    1
75011  link      max
80021  lookahead 0.5
95003  release   20
110017 hold      0
"""


def schedule_text(algorithm):
    if algorithm == "limiter":
        body = LIMITER_SCHEDULE
    else:
        body = SCHEDULES[algorithm] + COMMON_STEPS
    return f"livedyn-automation 1 samplerate={FS}\n" + body


def make(algorithm, precision="float64"):
    if algorithm == "ducker":
        return livedyn.Processor("ducker", FS, 2, key_channels=1, precision=precision)
    return livedyn.Processor(algorithm, FS, 2, precision=precision)


def replay(algorithm, automation, x, key, blocksize, precision="float64"):
    proc = make(algorithm, precision)
    return run_with_automation(proc.process, proc.set, x, key, automation, blocksize)


ALGORITHMS = ("compressor", "expander", "gate", "ducker", "limiter")


@pytest.fixture(scope="module")
def signals():
    return {"main": noise_bursts(11, 2), "key": noise_bursts(12, 1)}


@pytest.mark.parametrize("precision", ["float64", "float32"])
@pytest.mark.parametrize("algorithm", ALGORITHMS)
def test_replay_is_bit_identical_across_block_sizes(algorithm, signals, tmp_path, precision):
    # automation that moves (ramps) and stops (steps, then nothing): the glides run and go
    # idle, and the output does not depend on where the blocks fall, in either precision
    path = tmp_path / f"{algorithm}.auto"
    path.write_text(schedule_text(algorithm), encoding="utf-8")
    auto = Automation.load(path, make(algorithm).schema)
    assert len(auto) > 1000  # the ramps were expanded into many steps

    x = signals["main"]
    key = signals["key"] if algorithm == "ducker" else None
    ref = replay(algorithm, auto, x, key, REFERENCE_BLOCKSIZE, precision)
    assert ref.shape == x.shape and ref.dtype == np.float32
    assert np.isfinite(ref).all()
    for bs in BLOCKSIZES:
        y = replay(algorithm, auto, x, key, bs, precision)
        assert y.tobytes() == ref.tobytes(), f"blocksize {bs} differs from {REFERENCE_BLOCKSIZE}"
    # every sample its own block, on the first part (the ramps and the first steps)
    y1 = replay(algorithm, auto, x[:FIRST], None if key is None else key[:FIRST], 1, precision)
    assert y1.tobytes() == ref[:FIRST].tobytes(), "blocksize 1 differs"

    # The automation does something, and nothing before its first event
    # (automation format specification: an event at frame F acts from frame F on).
    plain = replay(algorithm, None, x, key, REFERENCE_BLOCKSIZE, precision)
    first = auto.events[0][0]
    assert first > 0
    assert plain[:first].tobytes() == ref[:first].tobytes()
    assert not np.array_equal(plain, ref)


def test_replay_ends_on_the_last_values(signals, tmp_path):
    """After the replay every control holds the last value its events gave it."""
    path = tmp_path / "c.auto"
    path.write_text(schedule_text("compressor"), encoding="utf-8")
    proc = make("compressor")
    auto = Automation.load(path, proc.schema)
    run_with_automation(proc.process, proc.set, signals["main"], None, auto, 64)
    last = {}
    for _, name, value in auto:
        last[name] = value
    assert last["ratio"] == 3.0 and last["threshold"] == -30.0
    for name, value in last.items():
        assert proc.get(name) == value, name


def _write_wav(path, x, subtype="FLOAT"):
    sf.write(str(path), x, FS, subtype=subtype)


def _cli(argv, capsys):
    rc = cli.main([str(a) for a in argv])
    out = capsys.readouterr()
    assert rc == 0, out.err
    return out


@pytest.mark.parametrize("algorithm", ["compressor", "limiter", "ducker"])
def test_render_with_automation_is_block_size_independent(algorithm, signals, tmp_path, capsys):
    x = signals["main"][: 2 * FS]
    key = signals["key"][: 2 * FS]
    src = tmp_path / "in.wav"
    _write_wav(src, x)
    extra = []
    if algorithm == "ducker":
        _write_wav(tmp_path / "key.wav", key)
        extra = ["--key", tmp_path / "key.wav"]
    auto_path = tmp_path / "a.auto"
    auto_path.write_text(schedule_text(algorithm), encoding="utf-8")

    outs = {}
    for bs in (64, 4097):
        out = tmp_path / f"out{bs}.wav"
        _cli(["render", src, "--out", out, "--algorithm", algorithm, "--automation", auto_path,
              "--blocksize", bs, *extra], capsys)
        outs[bs] = out.read_bytes()
    assert outs[64] == outs[4097]

    # The file holds what an in-memory replay of the same events gives, with the processor's
    # starting latency taken off the front and the tail flushed with silence (render's
    # documented default).
    y_file, fs = sf.read(str(tmp_path / "out64.wav"), dtype="float32", always_2d=True)
    assert fs == FS and y_file.shape == x.shape
    proc = make(algorithm)
    lat = proc.latency_samples
    auto = Automation.load(auto_path, proc.schema)
    xp = np.concatenate([x, np.zeros((lat, 2), np.float32)])
    kp = None
    if algorithm == "ducker":
        kp = np.concatenate([key, np.zeros((lat, 1), np.float32)])
    y = run_with_automation(proc.process, proc.set, xp, kp, auto, 1000)[lat:]
    assert y_file.tobytes() == y.tobytes()
