"""User-written algorithms: a plain Python file that declares parameters and a gain curve.

A file such as::

    '''Soft clip of the gain: a compressor whose ratio grows with level.'''
    NAME = "growing-ratio"
    PARAMS = ["threshold", "attack", "release", "makeup",
              Param("growth", "dB", 1, 40, 12, help="level above threshold where the ratio doubles")]

    def gain_curve(level_db, p):
        over = level_db - p[P.threshold]
        if over <= 0.0:
            return 0.0
        return -over * over / (over + p[P.growth])

is a complete algorithm: livedyn's own detector, ballistics, key filters, lookahead, mix and
safety stages run around the curve. ``gain_curve(level_db, p)`` takes the detector level in dB
and the parameter array and returns the gain in dB (<= 0 attenuates); ``P`` is an enumeration
livedyn puts into the module whose members name the parameter slots (``p[P.threshold]``).
``PARAMS`` lists livedyn's parameters by name and the file's own as :class:`Param`.

The curve is compiled with numba in nopython mode (``error_model="numpy"``, no fastmath) as a
C-callable function off the audio thread; the built-in fused kernel calls it through its address
(:mod:`livedyn.dsp.calls`), so the kernel itself stays compiled and cached.
"""
from __future__ import annotations

import enum
import hashlib
import importlib.util
import sys
import traceback
from pathlib import Path

from ..params import ALL, LAW_USER, USER_SLOT0, NPARAM, Param, ParamError, Schema

__all__ = ["UserAlgorithmError", "load", "user_param", "is_user_file"]


class UserAlgorithmError(ParamError):
    """A user algorithm file that cannot be used; one line naming the file (and line)."""


def user_param(name, unit, lo, hi, default, help="", taper="linear", update="sample"):
    """A parameter of the file's own (slot assigned by livedyn)."""
    return Param(name, -1, unit, float(lo), float(hi), float(default), taper, update, help)


def is_user_file(spec) -> bool:
    return str(spec).endswith(".py")


def _where(path, exc):
    tb = traceback.extract_tb(exc.__traceback__)
    lines = [f for f in tb if Path(f.filename).resolve() == path]
    return f"{path}:{lines[-1].lineno}" if lines else str(path)


def load(path):
    """Load, check and compile a user algorithm file; returns an Algorithm."""
    from .builtin import Algorithm

    path = Path(path).resolve()
    if not path.is_file():
        raise UserAlgorithmError(f"{path}: no such algorithm file (expected a .py file)")
    source = path.read_text(encoding="utf-8", errors="replace")
    try:
        compile(source, str(path), "exec")
    except SyntaxError as e:
        raise UserAlgorithmError(f"{path}:{e.lineno}: syntax error: {e.msg}") from None
    digest = hashlib.sha256(source.encode()).hexdigest()[:12]
    modname = f"livedyn_user_{path.stem.replace('-', '_')}_{digest}"
    spec = importlib.util.spec_from_file_location(modname, path)
    module = importlib.util.module_from_spec(spec)
    module.Param = user_param  # so that the file needs no import for its own parameters
    try:
        spec.loader.exec_module(module)
    except Exception as e:  # the user's code raised while being imported
        raise UserAlgorithmError(f"{_where(path, e)}: {type(e).__name__}: {e}") from None
    sys.modules[modname] = module

    schema, slots = _schema(path, getattr(module, "PARAMS", None))
    module.P = enum.IntEnum("P", slots)
    curve = getattr(module, "gain_curve", None)
    if curve is None or not callable(curve):
        raise UserAlgorithmError(f"{path}: defines no gain_curve(level_db, p) function")
    cfunc = _compile_curve(path, curve)
    name = str(getattr(module, "NAME", path.stem))
    desc = (module.__doc__ or "").strip().splitlines()[0] if module.__doc__ else ""
    return Algorithm(name, desc or f"user algorithm {path.name}", schema, "dynamics", LAW_USER,
                     source=path, user_curve=cfunc)


def _schema(path, params):
    if params is None:
        raise UserAlgorithmError(f"{path}: defines no PARAMS list (livedyn's parameter names "
                                 "and Param(...) entries of its own)")
    out, slots, next_slot = {}, {}, USER_SLOT0
    for entry in params:
        if isinstance(entry, str):
            if entry not in ALL:
                raise UserAlgorithmError(f"{path}: PARAMS: unknown parameter {entry!r}; "
                                         f"livedyn's are {', '.join(ALL)}")
            prm = ALL[entry]
        elif isinstance(entry, Param):
            if entry.name in ALL or not entry.name.isidentifier():
                raise UserAlgorithmError(f"{path}: PARAMS: {entry.name!r} is livedyn's own name "
                                         "or not an identifier; choose another")
            if next_slot >= NPARAM:
                raise UserAlgorithmError(f"{path}: PARAMS: more than {NPARAM - USER_SLOT0} "
                                         "parameters of the file's own")
            prm = Param(**{**entry.__dict__, "slot": next_slot})
            next_slot += 1
        else:
            raise UserAlgorithmError(f"{path}: PARAMS: {entry!r}: expected a parameter name "
                                     "or Param(...)")
        out[prm.name] = prm
        slots[prm.name] = prm.slot
    for needed in ("attack", "release"):
        if needed not in out:
            out[needed] = ALL[needed]
            slots[needed] = ALL[needed].slot
    return Schema(out), slots


def _compile_curve(path, fn):
    import numba as nb
    from numba import carray, types

    try:
        jit = fn if hasattr(fn, "py_func") else nb.njit(error_model="numpy", nogil=True)(fn)

        def wrapper(x, pp):
            return jit(x, carray(pp, (NPARAM,)))

        cf = nb.cfunc(types.float64(types.float64, types.CPointer(types.float64)),
                      nopython=True, error_model="numpy")(wrapper)
    except Exception as e:
        first = str(e).strip().splitlines()
        reason = next((ln for ln in first if ln.strip() and not ln.startswith("-")), str(e))
        raise UserAlgorithmError(f"{path}: gain_curve does not compile in nopython mode: "
                                 f"{reason.strip()[:200]}") from None
    return cf
