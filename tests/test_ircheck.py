"""The load-time check of user code against the real-time contract (livedyn.dsp.ircheck).

Every user stage and kernel is scanned after compiling: a reachable allocation (numba's
runtime, NRT) or interpreter-lock path (an exception to raise) is refused with the file and
the line of the stage; the wrapper's lock path that is dead (every status a constant 0) is not
flagged. The contract: DEVELOPERS.md, "The live engine".
"""
from __future__ import annotations

import textwrap

import numba as nb
import numpy as np
import pytest
from numba import types

from livedyn.loader import UserAlgorithmError, load
from livedyn.dsp.abi import job_function
from livedyn.dsp.ircheck import IRModule, check_native

CLEAN_DETECTOR = '''
"""A peak detector (clean)."""
PARAMS = ["threshold", "ratio", "attack", "release"]


def detector(k, p, s):
    return abs(k)
'''

ALLOCATING_DETECTOR = '''
"""A detector that makes an array per sample."""
import numpy as np

PARAMS = ["threshold", "ratio", "attack", "release"]


def detector(k, p, s):
    a = np.zeros(4)
    a[0] = abs(k)
    return a.max()
'''

RAISING_KERNEL = '''
"""A kernel that prints (numba's print takes the interpreter lock)."""
PARAMS = ["threshold"]


def kernel(x, key, out, p, s):
    for n in range(x.shape[0]):
        for c in range(x.shape[1]):
            if x[n, c] > 10.0:
                print(x[n, c])
            out[n, c] = x[n, c]
'''


CLEAN_KERNEL = '''
"""A kernel with state that slices its arrays (views: no allocation)."""
PARAMS = ["threshold"]
STATE = ["level"]


def kernel(x, key, out, p, s):
    for c in range(x.shape[1]):
        col = x[:, c]
        for n in range(x.shape[0]):
            s[c, S.level] = 0.99 * s[c, S.level] + 0.01 * abs(col[n])
            out[n, c] = col[n]
'''


def _file(tmp_path, name, text):
    f = tmp_path / name
    f.write_text(textwrap.dedent(text).lstrip())
    return f


def test_a_clean_stage_passes(tmp_path):
    alg = load(_file(tmp_path, "clean.py", CLEAN_DETECTOR))
    assert alg.user_detector is not None
    assert check_native(alg.user_detector) == []


def test_a_clean_kernel_with_state_and_views_passes(tmp_path):
    alg = load(_file(tmp_path, "clean_kernel.py", CLEAN_KERNEL))
    assert check_native(alg.user_job) == []


def test_an_allocating_detector_is_refused_with_file_and_line(tmp_path):
    f = _file(tmp_path, "alloc.py", ALLOCATING_DETECTOR)
    with pytest.raises(UserAlgorithmError) as e:
        load(f)
    msg = str(e.value)
    line = ALLOCATING_DETECTOR.lstrip().splitlines().index("def detector(k, p, s):") + 1
    assert msg.startswith(f"{f}:{line}: detector allocates in the audio thread"), msg
    assert "NRT" in msg and "\n" not in msg


def test_a_kernel_that_calls_python_is_refused_with_file_and_line(tmp_path):
    f = _file(tmp_path, "raise.py", RAISING_KERNEL)
    with pytest.raises(UserAlgorithmError) as e:
        load(f)
    msg = str(e.value)
    line = RAISING_KERNEL.lstrip().splitlines().index("def kernel(x, key, out, p, s):") + 1
    assert msg.startswith(f"{f}:{line}: kernel takes the interpreter lock"), msg


@nb.njit(error_model="numpy")
def _copy_kernel(x, key, out, p, st, ring, tr):
    for n in range(x.shape[0]):
        for c in range(x.shape[1]):
            out[n, c] = x[n, c]


def test_the_job_factory_makes_clean_code_and_its_dead_lock_path_is_not_flagged():
    job = job_function(_copy_kernel)
    assert check_native(job) == []
    # the wrapper's lock path is there, and only dead because every status is a constant 0
    blind = IRModule(job.inspect_llvm(), prune=False, trusted=("livedyn.",)).scan()
    assert any("numba_gil_ensure" in v for v in blind["violations"])


@nb.cfunc(types.int64(types.int64, types.int64), nopython=True)
def _python_error_model(a, b):
    return a // b  # the default error model raises ZeroDivisionError under the lock


def test_code_compiled_with_the_python_error_model_is_flagged():
    bad = check_native(_python_error_model)
    assert any("may return status" in v for v in bad) and any("gil" in v for v in bad), bad
