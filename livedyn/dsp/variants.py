"""Kernels that run only what is switched on: the dynamics kernel compiled for one setting of
its structural choices.

The dynamics kernel decides per block, from the parameter array, which law, detector,
ballistics, domain, topology, key, link, key filters and user stages it runs
(:func:`livedyn.dsp.dynamics.dynamics_modes`, one integer of ``M_*`` bits), and branches on
those choices per sample. A *variant* is the same source (in either precision, see
:mod:`livedyn.dsp.precision`) with that integer a constant: numba and LLVM then drop every
branch the setting does not take. Its output is the general kernel's, bit for bit (a test
checks this across settings and block splits).

A variant is only called with parameters of its own setting:

* :meth:`livedyn.processor.Processor.process` compares the modes per call;
* the live callback calls the variant's job function, which compares them per block and, when
  a change of setting has arrived before the engine installed the matching variant, calls the
  general kernel's job function instead (its address is in the job block, ``J.FALLBACK``). So
  installing a variant, or changing a setting while one runs, never needs the two to be in
  step.

Variants are compiled on first use (the live engine does it on a thread of its own, off the
audio thread, and the callback runs the general kernel meanwhile) into the user cache folder,
one module per precision and setting, and loaded from there afterwards.
"""
from __future__ import annotations

import ast
import threading
from pathlib import Path

from .precision import _folder, check, import_text, module_text

_LOCK = threading.Lock()
_LOADED = {}

_JOB = """\"\"\"Job function of a dynamics variant (written by livedyn.dsp.variants).\"\"\"
import numba as nb
import numpy as np
from numba import carray

from livedyn.dsp.abi import JOB_SIG, JOB_SIZE, J_FALLBACK, job_arrays
from livedyn.dsp.intrinsics import call_job
from {kernel} import MODES, dynamics_block, dynamics_modes


@nb.cfunc(JOB_SIG, nopython=True, error_model="numpy", cache=True)
def job_variant(jp):
    \"\"\"This variant's setting runs the variant; another runs the general kernel's job.\"\"\"
    job = carray(jp, (JOB_SIZE,), np.int64)
    x, k, y, p, st, ring, tr = job_arrays(job)
    if dynamics_modes(p) != MODES:
        call_job(job[J_FALLBACK], jp)
    else:
        dynamics_block(x, k, y, p, st, ring, tr)
"""


class _Constant(ast.NodeTransformer):
    """In ``dynamics_block``: ``modes = dynamics_modes(p)`` becomes ``modes = <the value>``."""

    def __init__(self, modes):
        self.modes = int(modes)
        self.done = 0

    def visit_FunctionDef(self, node):
        if node.name != "dynamics_block":
            return node
        for i, stmt in enumerate(node.body):
            if (isinstance(stmt, ast.Assign) and len(stmt.targets) == 1
                    and isinstance(stmt.targets[0], ast.Name) and stmt.targets[0].id == "modes"
                    and isinstance(stmt.value, ast.Call)
                    and getattr(stmt.value.func, "id", "") == "dynamics_modes"):
                stmt.value = ast.copy_location(ast.Constant(self.modes), stmt.value)
                self.done += 1
        return node


def dynamics_variant(modes, precision="float64"):
    """The module of the dynamics kernel for ``modes`` (an integer from ``dynamics_modes``)
    in ``precision``: ``dynamics_block`` (the kernel, same contract, compiled or loaded from
    the cache at its first call) and ``MODES``; :func:`job_variant` adds its job function."""
    precision = check(precision)
    modes = int(modes)
    if not 0 <= modes < 1 << 16:
        raise ValueError(f"modes = {modes}: expected 0 to 65535 (see dynamics_modes)")
    key = (modes, precision)
    with _LOCK:
        if key in _LOADED:
            return _LOADED[key]
        const = _Constant(modes)
        text = module_text("dynamics", precision, transform=const)
        if const.done != 1:
            raise RuntimeError("internal: the dynamics kernel's modes line was not found")
        text += f"\n\nMODES = {modes}\n"
        folder = _folder("variants")
        name = _name(folder, modes, precision)
        mod = import_text(folder, name, text, precision == "float32")
        _LOADED[key] = mod
        return mod


def job_variant(modes, precision="float64"):
    """The job function (``void fn(void *job)``) of the variant for ``modes``: made on first
    use, apart from the kernel (offline use needs only the kernel) and once the kernel
    module's constants are final."""
    mod = dynamics_variant(modes, precision)
    with _LOCK:
        job = getattr(mod, "job_variant", None)
        if job is None:
            folder = Path(mod.__file__).parent
            job = import_text(folder, mod.__name__ + "_job", _JOB.format(kernel=mod.__name__),
                              False).job_variant
            mod.job_variant = job
        return job


def _name(folder, modes, precision):
    return f"livedyn_v_{folder.name}_{'f32' if precision == 'float32' else 'f64'}_{modes}"


def ready(modes, precision="float64"):
    """True when the variant's job function is in this process already, or its machine code
    is in the cache (so that making it is a load, not a compilation)."""
    mod = _LOADED.get((int(modes), check(precision)))
    if mod is not None and getattr(mod, "job_variant", None) is not None:
        return True
    folder = _folder("variants")
    name = _name(folder, int(modes), check(precision))
    return any((folder / "__pycache__").glob(f"{name}_job.job_variant-*.nbi"))


def loaded(modes, precision="float64"):
    """The variant if this process has it already, else None (never compiles)."""
    return _LOADED.get((int(modes), check(precision)))
