"""User algorithm files: a gain curve in a plain Python file runs inside the built-in kernel."""
import subprocess
import sys
import textwrap

import numpy as np
import pytest

import livedyn
from livedyn.loader import UserAlgorithmError, load

PLAIN = '''
"""Hard-knee compressor curve, written as a user file."""
NAME = "plain-comp"
PARAMS = ["threshold", "ratio", "attack", "release", "makeup"]


def gain_curve(level_db, p):
    over = level_db - p[P.threshold]
    if over > 0.0:
        return -(1.0 - 1.0 / p[P.ratio]) * over
    return 0.0
'''

OWN = '''
"""A compressor whose ratio grows with level."""
PARAMS = ["threshold", "attack", "release",
          Param("growth", "dB", 1, 40, 12, help="overshoot at which the slope is one half")]


def gain_curve(level_db, p):
    over = level_db - p[P.threshold]
    if over <= 0.0:
        return 0.0
    return -over * over / (over + p[P.growth])
'''


def write(tmp_path, text, name="algo.py"):
    f = tmp_path / name
    f.write_text(textwrap.dedent(text))
    return f


def noise(frames=24000, ch=2, seed=0):
    rng = np.random.default_rng(seed)
    return (0.5 * rng.standard_normal((frames, ch))).astype(np.float32)


def test_a_user_curve_equal_to_the_builtin_gives_the_same_output(tmp_path):
    # the same equation ([GMR2012] eq. 3) written by a user, run in the same kernel: identical
    f = write(tmp_path, PLAIN)
    x = noise()
    a = livedyn.Processor(load(f), 48000, 2, threshold=-24, ratio=4, attack=5, release=80)
    b = livedyn.Processor("compressor", 48000, 2, threshold=-24, ratio=4, attack=5,
                          release=80, knee=0)
    np.testing.assert_array_equal(a.process(x), b.process(x))
    assert a.algorithm.name == "plain-comp"


def test_own_parameters_get_slots_and_are_validated(tmp_path):
    f = write(tmp_path, OWN)
    p = livedyn.Processor(load(f), 48000, 1, threshold=-30, growth=6, attack=0)
    assert p.get("growth") == 6
    with pytest.raises(livedyn.params.ParamError, match="growth = 80 dB: out of range"):
        p.set("growth", 80)
    # steady square wave at -10 dBFS: 20 dB over threshold -> gain -20*20/(20+6) dB
    n = np.arange(4800)
    x = np.where((n // 48) % 2 == 0, 10 ** (-10 / 20), -(10 ** (-10 / 20)))[:, None]
    y = p.process(x.astype(np.float32))
    got = 20 * np.log10(abs(float(y[-1, 0]))) + 10
    assert got == pytest.approx(-20 * 20 / 26, abs=1e-3)


@pytest.mark.parametrize("text,words", [
    ("PARAMS = ['threshold']\ndef gain_curve(x, p)\n    return 0.0\n", ["algo.py:2", "syntax"]),
    ("PARAMS = ['threshold']\n", ["defines none of detector, gain_curve"]),
    ("PARAMS = ['threshold']\ndef gain_curve(x, p):\n    return 0.0\n"
     "def kernel(x, k, o, p, s):\n    pass\n", ["kernel and also gain_curve"]),
    ("PARAMS = ['threshold']\nSTATE = 'env'\ndef gain_curve(x, p):\n    return 0.0\n",
     ["STATE = 'env': expected a list of names"]),
    ("PARAMS = ['threshold']\nBLOCK = 256\ndef gain_curve(x, p):\n    return 0.0\n",
     ["BLOCK and LATENCY belong to a whole kernel"]),
    ("PARAMS = ['threshold']\ndef gain_curve(x, p):\n    return 'a' + x\n",
     ["algo.py:3", "does not compile", "add(", "--full"]),
    ("def gain_curve(x, p):\n    return 0.0\n", ["no PARAMS"]),
    ("PARAMS = ['loudness']\ndef gain_curve(x, p):\n    return 0.0\n", ["unknown parameter"]),
    ("PARAMS = ['threshold']\ndef gain_curve(x, p):\n    return {'a': x}\n",
     ["does not compile"]),
    ("PARAMS = ['threshold']\nraise RuntimeError('broken on purpose')\n",
     ["algo.py:2", "broken on purpose"]),
])
def test_broken_files_give_one_line_naming_the_file(tmp_path, text, words):
    f = write(tmp_path, text)
    with pytest.raises(UserAlgorithmError) as e:
        load(f)
    msg = str(e.value)
    assert "\n" not in msg
    for w in words:
        assert w in msg, msg


def test_render_accepts_an_algorithm_file(tmp_path):
    import soundfile as sf

    f = write(tmp_path, PLAIN)
    x = noise(9600)
    sf.write(tmp_path / "in.wav", x, 48000, subtype="FLOAT")
    r = subprocess.run([sys.executable, "-m", "livedyn.cli", "render", str(tmp_path / "in.wav"),
                        "--out", str(tmp_path / "out.wav"), "--algorithm", str(f), "--set",
                        "threshold=-30"], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    y, _ = sf.read(tmp_path / "out.wav", dtype="float32")
    ref = livedyn.Processor("compressor", 48000, 2, threshold=-30, knee=0).process(x)
    np.testing.assert_array_equal(y, ref)


def test_measure_curve_of_a_user_file_matches_its_own_equation(tmp_path):
    # the square-wave sweep (exact detected level) against the curve the file itself defines
    f = write(tmp_path, OWN)
    r = subprocess.run([sys.executable, "-m", "livedyn.cli", "measure", "curve", "--algorithm",
                        str(f), "--signal", "square"], capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 0, r.stderr
    line = [ln for ln in r.stdout.splitlines() if ln.startswith("largest square-wave error")]
    assert line and float(line[0].split(":")[1].split()[0]) < 0.01
    rows = [ln.split() for ln in r.stdout.splitlines() if ln.strip().endswith(tuple("0123456789"))
            and "square" in ln]
    # threshold at its default, -20 dBFS: at 0 dBFS the level is 20 dB over: -20*20/(20+12) dB
    top = [row for row in rows if float(row[0]) == 0.0][0]
    assert float(top[3]) == __import__("pytest").approx(-20 * 20 / 32, abs=0.01)


def test_a_preset_can_name_an_algorithm_file(tmp_path):
    from livedyn.render import Setup, build_processor

    write(tmp_path, OWN, "grow.py")
    (tmp_path / "mine.toml").write_text(
        'preset_format = 1\nalgorithm_file = "grow.py"\n[params]\nthreshold = -36\ngrowth = 8\n')
    p = build_processor(Setup(preset=str(tmp_path / "mine.toml")), 48000, 2)
    assert p.get("threshold") == -36 and p.get("growth") == 8
    (tmp_path / "bad.toml").write_text(
        'preset_format = 1\nalgorithm_file = "grow.py"\n[params]\ngrowth = 99\n')
    with pytest.raises(livedyn.params.ParamError, match="growth = 99 dB: out of range"):
        build_processor(Setup(preset=str(tmp_path / "bad.toml")), 48000, 2)


def test_a_user_file_live_equals_its_offline_render(tmp_path, jack_server):
    # the same file in the live callback (headless server) and offline, block by block
    import time

    import soundfile as sf

    from livedyn.engine.engine import ArraySource, Engine

    f = write(tmp_path, OWN)
    x = noise(48000)
    proc = livedyn.Processor(load(f), 48000, 2, threshold=-30, attack=2)
    ref = livedyn.Processor(load(f), 48000, 2, threshold=-30, attack=2)
    eng = Engine(proc, 64, main_source=ArraySource(x), record_dir=tmp_path / "rec",
                 fade_in_ms=0.0, meters=False)
    eng.start()
    t_end = time.monotonic() + 10
    while not eng.source_finished and time.monotonic() < t_end:
        time.sleep(0.02)
    eng.stop()
    y, _ = sf.read(tmp_path / "rec" / "out.wav", dtype="float32")
    m, _ = sf.read(tmp_path / "rec" / "main.wav", dtype="float32")
    n = len(x) - 64 * 40  # well before the stop fade
    off = np.concatenate([ref.process(m[i:i + 64]) for i in range(0, n, 64)])
    off = np.clip(off, -10 ** (-1 / 20), 10 ** (-1 / 20))  # the engine's last stage: -1 dBFS
    np.testing.assert_array_equal(y[:n], off[:n])
    assert np.abs(y[:n]).max() > 0.01


def test_defaults_set_the_files_own_defaults_and_are_validated(tmp_path):
    text = ("PARAMS = ['key', 'threshold', 'range']\nDEFAULTS = @@\n"
            "def gain_curve(x, p):\n    return max(-p[P.range], min(0.0, p[P.threshold] - x))\n")
    f = write(tmp_path, text.replace("@@", "{'key': 'external', 'range': 9}"))
    alg = load(f)
    assert alg.schema["range"].default == 9 and alg.needs_key
    assert livedyn.Processor(alg, 48000, 2, key_channels=1).get("key") == 1.0  # external
    assert livedyn.Processor(alg, 48000, 2).get("key") == 0.0  # no key channels: main
    with pytest.raises(UserAlgorithmError, match="DEFAULTS: range = 999 dB: out of range"):
        load(write(tmp_path, text.replace("@@", "{'range': 999}"), "bad.py"))
    with pytest.raises(UserAlgorithmError, match="DEFAULTS: 'ratio' is not one of"):
        load(write(tmp_path, text.replace("@@", "{'ratio': 2}"), "bad2.py"))
