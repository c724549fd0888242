"""``livedyn new-algorithm NAME``: a commented starting file for each kind of stage."""
from __future__ import annotations

from pathlib import Path

from ..params import ParamError

HEAD = '''"""{name}: describe in this first line what the algorithm does (it is shown in listings)."""
# A livedyn algorithm file. Try it:
#     livedyn check {file}
#     livedyn run --headless --key-demo --algorithm {file} --watch
#     livedyn render IN.wav --out OUT.wav --algorithm {file}
#     livedyn bench kernels --algorithm {file}
# With --watch, save this file while it plays: livedyn compiles and checks the new version off
# the audio thread and crossfades to it. A version that fails its checks is refused with one
# line and the old one keeps playing.
#
# Rules of the road (livedyn checks them when it loads the file):
# - Stages are compiled by numba in nopython mode: numbers, math, numpy arrays; no Python
#   objects, no printing, no allocation per call (declare STATE instead).
# - Output must stay finite, and the gain may not rise above makeup unless BOOST = True.
# - The output may not depend on how the host splits the stream into blocks.
# - p[P.name] reads a parameter; P lists the names in PARAMS. p[P.samplerate] is the rate.

NAME = "{name}"
'''

CURVE = '''
# livedyn's parameters by name, and the file's own as Param(name, unit, lo, hi, default, help=)
PARAMS = ["threshold", "attack", "release", "makeup",
          Param("strength", "", 0.0, 1.0, 0.75, help="0: no compression, 1: a limiter")]


def gain_curve(level_db, p):
    """Detector level in dB in, gain in dB out (0 = unity, negative = attenuation).

    livedyn's own key filters, detector, attack/release, lookahead, makeup and mix run around
    it. Here: a hard-knee curve whose slope above threshold is `strength`."""
    over = level_db - p[P.threshold]
    if over <= 0.0:
        return 0.0
    return -p[P.strength] * over
'''

DETECTOR = '''
PARAMS = ["threshold", "ratio", "knee", "attack", "release", "makeup",
          Param("hold_time", "ms", 0.0, 500.0, 30.0, help="how long a peak is held")]

# State per channel: zero at start, kept from block to block; s[S.name] in the stages.
STATE = ["peak", "left"]


def detector(k, p, s):
    """The filtered key sample in, a level out (linear amplitude, >= 0); livedyn converts it to
    dB for the built-in compressor curve. Here: a peak that is held for `hold_time`."""
    a = abs(k)
    if a >= s[S.peak]:
        s[S.peak] = a
        s[S.left] = p[P.hold_time] * p[P.samplerate] / 1000.0
    elif s[S.left] > 0.0:
        s[S.left] -= 1.0
    else:
        s[S.peak] = a
    return s[S.peak]
'''

SMOOTHER = '''
PARAMS = ["threshold", "ratio", "knee", "makeup",
          Param("rise", "dB/ms", 0.01, 10.0, 1.0, help="fastest fall of the gain (attack)"),
          Param("recover", "dB/s", 1.0, 200.0, 20.0, help="speed of recovery (release)")]

STATE = ["gain"]


def smoother(target_db, p, s):
    """The curve's gain in dB in, the smoothed gain in dB out: here, slew-rate limits."""
    fs = p[P.samplerate]
    down = p[P.rise] * 1000.0 / fs
    up = p[P.recover] / fs
    g = s[S.gain]
    if target_db < g:
        g = max(target_db, g - down)
    else:
        g = min(target_db, g + up)
    s[S.gain] = g
    return g
'''

KERNEL = '''import math

PARAMS = ["threshold", "makeup",
          Param("depth", "dB", 0.0, 40.0, 10.0, help="largest gain reduction"),
          Param("speed", "ms", 1.0, 1000.0, 50.0, help="time constant of the level follower")]

STATE = ["env"]


def kernel(x, key, out, p, s):
    """The whole kernel: x, key and out are float32 (frames, channels); s is (channels, STATE).

    Write every out[n, c]. livedyn's last stage (non-finite guard, fade, ceiling) still runs
    after it. Here: a linked mean-square follower on the key, and a gain that falls linearly in
    dB from 0 to -depth as the level rises from threshold to threshold + depth."""
    a = math.exp(-1000.0 / (p[P.speed] * p[P.samplerate]))
    mk = 10.0 ** (p[P.makeup] / 20.0)
    thr = p[P.threshold]
    depth = p[P.depth]
    env = s[0, S.env]
    for n in range(x.shape[0]):
        m = 0.0
        for c in range(key.shape[1]):
            m = max(m, key[n, c] * key[n, c])
        env = a * env + (1.0 - a) * m
        level_db = 10.0 * math.log10(env + 1e-20)
        cut = min(depth, max(0.0, level_db - thr))
        g = mk * 10.0 ** (-cut / 20.0)
        for c in range(x.shape[1]):
            out[n, c] = x[n, c] * g
    s[0, S.env] = env
'''

BODIES = {"gain_curve": CURVE, "detector": DETECTOR, "smoother": SMOOTHER, "kernel": KERNEL}


def template_text(name, stage="gain_curve", file=None):
    if stage not in BODIES:
        raise ParamError(f"stage {stage!r}: expected one of {', '.join(BODIES)}")
    return HEAD.format(name=name, file=file or f"{name}.py") + BODIES[stage]


def example_names():
    """The shipped example algorithm files (package data), by stem."""
    from ..shipped import examples_folder

    return sorted(p.stem for p in examples_folder().glob("*.py"))


def write_template(name, stage="gain_curve", example=None):
    """Write NAME.py (never over an existing file); returns its path.

    With ``example`` (one of :func:`example_names`) the file is a copy of that shipped example
    instead of a starting template."""
    path = Path(name)
    if not str(name).strip() or path.name in ("", ".", ".."):
        raise ParamError(f"new-algorithm {str(name)[:80]!r}: expected a file name such as "
                         "my_compressor (or a path ending in one)")
    if path.suffix != ".py":
        path = path.with_name(path.name + ".py")
    stem = path.stem
    if not stem.replace("-", "_").isidentifier():
        raise ParamError(f"new-algorithm {name!r}: expected a name of letters, digits, - and _")
    if path.exists():
        raise ParamError(f"{path}: exists; choose another name (livedyn never overwrites it)")
    if not path.parent.is_dir():
        raise ParamError(f"{path}: folder {path.parent} does not exist")
    if example is not None:
        from ..shipped import examples_folder

        have = example_names()
        if example not in have:
            raise ParamError(f"--example {example!r}: expected one of {', '.join(have)}")
        text = (examples_folder() / f"{example}.py").read_text(encoding="utf-8")
    else:
        text = template_text(stem, stage, file=str(path))
    with open(path, "x", encoding="utf-8") as f:  # "x": fails rather than overwrite
        f.write(text)
    return path
