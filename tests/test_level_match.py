"""Level matching of two settings (livedyn.analysis.level_match), as the console's ``match``
and a script use it.

Sources of the checks
---------------------
* Loudness: ITU-R BS.1770-4. A gain of g dB on the whole signal moves its integrated loudness
  by exactly g LU: K-weighting is linear and both gates are levels relative to the signal
  (absolute -70 LUFS, far below the signals here; relative -10 LU), so they move with it.
* pyloudnorm (a BS.1770 implementation from the package registry) measures the same rendered
  outputs independently; 0.1 LU, as in tests/test_loudness.py, covers its filter's slightly
  different high-pass (explained there).
"""
from __future__ import annotations

import numpy as np
import pyloudnorm as pyln
import pytest

from livedyn.analysis import LevelMatchError, level_match, render_with

FS = 48000


def noise(seconds=4.0, db=-30.0, channels=2, seed=3):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((int(seconds * FS), channels)) * 10 ** (db / 20)
    return np.clip(x, -1, 1).astype(np.float32)


def test_two_makeups_match_by_their_difference():
    x = noise()
    # far below threshold: the compressor only applies its makeup
    a = {"threshold": 0.0, "makeup": 6.0}
    b = {"threshold": 0.0, "makeup": 0.0}
    m = level_match("compressor", FS, 2, 0, {"a": a, "b": b}, x)
    assert m.loudness["a"] - m.loudness["b"] == pytest.approx(6.0, abs=0.01)
    assert m.trims["b"] == 0.0 and m.trims["a"] == pytest.approx(-6.0, abs=0.01)
    assert m.seconds == pytest.approx(4.0)
    for s, values in (("a", a), ("b", b)):
        y = render_with("compressor", FS, 2, 0, values, x)
        ref = pyln.Meter(FS).integrated_loudness(y.astype(np.float64))
        assert m.loudness[s] == pytest.approx(ref, abs=0.1)


def test_silence_cannot_be_matched():
    x = np.zeros((FS * 2, 1), np.float32)
    with pytest.raises(LevelMatchError, match="slot A and B measures below the -70 LUFS gate"):
        level_match("compressor", FS, 1, 0, {"a": {}, "b": {}}, x)


def test_external_key_without_a_key_signal_is_refused():
    x = noise(1.0, channels=1)
    with pytest.raises(LevelMatchError, match="key input is needed"):
        render_with("ducker", FS, 1, 1, {"key": "external"}, x, None)
