"""Kernel variants: the dynamics kernel compiled for one setting gives the general kernel's
output bit for bit, in both precisions, and the live engine installs them without a seam.

The reference here is the general kernel itself, which tests/test_dynamics.py checks against
the published equations (DEVELOPERS.md, "Identical output whatever the block split").
"""
import numpy as np
import pytest

import livedyn
from livedyn.dsp import variants
from livedyn.dsp.dynamics import M_EXTERNAL, M_HPF, M_RMS, dynamics_modes
from livedyn.shipped import examples_folder

FS = 48000

SETTINGS = [
    ("compressor", {}),
    ("compressor", dict(detector="rms", ballistics="decoupled", domain="linear", hold=20,
                        automakeup="on", link="none", key_hpf=80, key_lpf=9000)),
    ("compressor", dict(topology="feedback", ratio=3, link="mean", key_bpf=1000)),
    ("expander", dict(threshold=-40, hysteresis=3)),
    ("gate", {}),
    ("ducker", dict(threshold=-40)),
]


def _bursts(frames, ch, seed):
    rng = np.random.default_rng(seed)
    x = 0.3 * rng.standard_normal((frames, ch))
    env = np.repeat(rng.choice([0.003, 0.05, 0.5], size=frames // 1200 + 1), 1200)[:frames]
    return (x * env[:, None]).astype(np.float32)


def _run(proc, x, key, bs):
    return np.concatenate([proc.process(x[i:i + bs], None if key is None else key[i:i + bs])
                           for i in range(0, len(x), bs)])


# every setting in float64; in float32 two (a variant is the same rewrite of either source)
CASES = [(a, s, "float64") for a, s in SETTINGS] + [
    (SETTINGS[0][0], SETTINGS[0][1], "float32"), (SETTINGS[-1][0], SETTINGS[-1][1], "float32")]


@pytest.mark.parametrize("alg,settings,precision", CASES,
                         ids=lambda v: v if isinstance(v, str) else
                         ",".join(f"{k}={w}" for k, w in v.items()) or "defaults")
def test_a_variant_gives_the_general_kernels_output_bit_for_bit(alg, settings, precision):
    kch = 1 if alg == "ducker" else 0
    x = _bursts(12000, 2, 1)
    key = _bursts(12000, 1, 2) if kch else None
    general = livedyn.Processor(alg, FS, 2, kch, precision=precision, **settings)
    special = livedyn.Processor(alg, FS, 2, kch, precision=precision, **settings)
    v = special.specialise()
    assert v.MODES == dynamics_modes(special.p)
    assert special.kernel_now() is v.dynamics_block
    assert general.kernel_now() is general._kernel
    ya = _run(general, x, key, 1024)
    yb = _run(special, x, key, 1024)
    assert yb.tobytes() == ya.tobytes()
    np.testing.assert_array_equal(special.st, general.st)  # the state too
    np.testing.assert_array_equal(special.ring, general.ring)
    for bs in (64, 4097):  # and for any block split
        special.reset()
        assert _run(special, x, key, bs).tobytes() == ya.tobytes(), bs


def test_the_bits_name_the_setting():
    p = livedyn.Processor("ducker", FS, 2, 1, key_hpf=120, detector="rms").p
    m = dynamics_modes(p)
    assert m & M_EXTERNAL and m & M_HPF and m & M_RMS
    assert not dynamics_modes(livedyn.Processor("compressor", FS, 2).p) & M_RMS


def test_another_setting_runs_the_general_kernel_and_back():
    x = _bursts(9000, 2, 3)
    a = livedyn.Processor("compressor", FS, 2)
    b = livedyn.Processor("compressor", FS, 2)
    v = b.specialise()
    ya, yb = [], []
    for i, (name, value) in enumerate([(None, None), ("detector", "rms"), ("detector", "peak")]):
        if name:
            a.set(name, value)
            b.set(name, value)
        assert (b.kernel_now() is v.dynamics_block) == (i != 1)
        ya.append(a.process(x[i * 3000:(i + 1) * 3000]))
        yb.append(b.process(x[i * 3000:(i + 1) * 3000]))
    assert np.concatenate(yb).tobytes() == np.concatenate(ya).tobytes()


def test_a_user_files_stages_have_variants_too():
    path = examples_folder() / "program_release.py"
    alg = livedyn.load_algorithm(path)
    x = _bursts(9000, 2, 4)
    a, b = livedyn.Processor(alg, FS, 2), livedyn.Processor(alg, FS, 2)
    assert b.specialise() is not None
    assert _run(b, x, None, 512).tobytes() == _run(a, x, None, 512).tobytes()


def test_no_variant_where_there_is_no_setting_to_fix():
    assert livedyn.Processor("limiter", FS, 2).specialise() is None
    with pytest.raises(ValueError, match="modes = 70000: expected 0 to 65535"):
        variants.dynamics_variant(70000)


def test_ready_tells_a_load_from_a_compilation():
    # the engine says "compiling" only when the variant's machine code is not in the cache
    m = int(dynamics_modes(livedyn.Processor("gate", FS, 2).p))
    variants.job_variant(m)
    assert variants.ready(m)
    never = (1 << 15) | (1 << 14) | (3 << 8) | 4  # user stages, link 3: no setting has it
    assert variants.loaded(never) is None and not variants.ready(never)
