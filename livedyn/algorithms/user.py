"""User-written algorithms: a plain Python file of parameters and numba stages.

A file such as::

    '''A compressor whose ratio grows with level.'''
    NAME = "growing-ratio"
    PARAMS = ["threshold", "attack", "release", "makeup",
              Param("growth", "dB", 1, 40, 12, help="level above threshold where the ratio halves")]

    def gain_curve(level_db, p):
        over = level_db - p[P.threshold]
        if over <= 0.0:
            return 0.0
        return -over * over / (over + p[P.growth])

is a complete algorithm: livedyn's own key filters, detector, ballistics, lookahead, mix and
safety stages run around the curve. A file may provide any of these stages; those it leaves out
are livedyn's built-ins:

``detector(k, p, s) -> level``
    Per sample and key channel: the filtered key sample ``k`` in, a level out as a linear
    amplitude (>= 0; livedyn takes it to dB). Replaces the peak/rms measure.
``gain_curve(level_db, p) -> gain_db``
    The static curve: detector level in dB in, gain in dB out (<= 0 attenuates).
``smoother(gain_db, p, s) -> gain_db``
    Per sample and gain channel: the curve's output in, the smoothed gain in dB out. Replaces
    the attack/release/hold ballistics.
``kernel(x, key, out, p, s)``
    The whole per-block kernel instead of all of the above: float32 ``x`` (frames, channels),
    ``key`` (frames, key channels; the main input when there is no key), ``out`` to write, the
    parameter array ``p`` and the state ``s`` (channels, nstate) float64.

``p`` is the float64 parameter array and ``P`` an enumeration livedyn puts into the module whose
members name its slots (``p[P.threshold]``, and ``p[P.samplerate]``). ``s`` is this channel's
row of declared state (the detector's rows, per key channel, are apart from the smoother's, per
gain channel):
``STATE = ["env", "peak"]`` gives ``s[S.env]`` and ``s[S.peak]``, zero at start, kept between
blocks (``STATE = 8`` gives eight unnamed slots). Other declarations: ``NAME``,
``DEFAULTS = {"key": "external", "range": 9}`` (the file's own defaults for its parameters,
livedyn's included), ``BOOST = True``
(gain above makeup is intended), ``BLOCK = n`` and ``LATENCY = n`` (a block-based design's own
frame size and its latency in samples).

Every stage is compiled with numba in nopython mode (``error_model="numpy"``, no fastmath) off
the audio thread. The stages run inside the built-in cached kernel, called through their
addresses (:mod:`livedyn.dsp.calls`); a whole kernel becomes a job function of its own. After
compiling, :mod:`livedyn.checks` runs the file on test signals and refuses it if it is unsafe;
:func:`livedyn.loader.load` does both (this module only compiles).
"""
from __future__ import annotations

import dataclasses
import enum
import hashlib
import os
import importlib.util
import re
import sys
import traceback
from pathlib import Path

import numpy as np

from ..params import (
    ALL, KEY_EXTERNAL, LAW_COMPRESSOR, LAW_USER, MAX_USER_LATENCY, NPARAM, P_SAMPLERATE,
    USER_SLOT0, Param, ParamError, Schema,
)

__all__ = ["UserAlgorithmError", "read_source", "compile_file", "user_param", "is_user_file",
           "STAGES", "MAX_STATE"]

STAGES = ("detector", "gain_curve", "smoother", "kernel")
MAX_STATE = 4096  # declared state slots per channel


class UserAlgorithmError(ParamError):
    """A user algorithm file that cannot be used; one line naming the file (and line).

    ``detail`` holds the full compiler or checker message, when there is one."""

    def __init__(self, message, detail=""):
        super().__init__(message)
        self.detail = detail


def user_param(name, unit, lo, hi, default, help="", taper="linear", update="sample"):
    """A parameter of the file's own (slot assigned by livedyn)."""
    return Param(name, -1, unit, float(lo), float(hi), float(default), taper, update, help)


def is_user_file(spec) -> bool:
    return str(spec).endswith(".py")


def _user_line(path, exc):
    """The line of ``path`` deepest in the traceback of ``exc``, or None."""
    tb = traceback.extract_tb(exc.__traceback__)
    lines = [f for f in tb if Path(f.filename).resolve() == path]
    return lines[-1].lineno if lines else None


def _where(path, exc, line=None):
    """``path:line`` for the user's line (``line``, or the deepest in ``exc``'s traceback)."""
    line = line or _user_line(path, exc)
    return f"{path}:{line}" if line else str(path)


def read_source(path):
    """``(resolved path, source text, digest)`` of an algorithm file; UserAlgorithmError if it
    cannot be read. The digest (12 hex digits of SHA-256) names the version."""
    path = Path(path).resolve()
    if not path.is_file():
        raise UserAlgorithmError(f"{path}: no such algorithm file (expected a .py file)")
    try:
        source = path.read_text(encoding="utf-8", errors="replace")
    except OSError as e:
        raise UserAlgorithmError(f"{path}: cannot read: {e.strerror}") from None
    return path, source, hashlib.sha256(source.encode()).hexdigest()[:12]


def compile_file(path, source, digest, precision="float64"):
    """Compile one version of an algorithm file (from :func:`read_source`) into an Algorithm,
    in ``precision`` ("float64", or "float32": the file's arithmetic in single precision, see
    :mod:`livedyn.dsp.precision`).

    Only compiles: the load-time checks, the cache of versions and the lookup by path belong to
    :mod:`livedyn.loader`, which sits above the Processor that the checks run. Raises
    UserAlgorithmError (one line; ``.detail`` for the full message)."""
    return _build(Path(path), source, digest, precision)


def _build(path, source, digest, precision="float64"):
    module = _import(path, source, digest, precision)
    return _from_module(path, module, digest, precision)


def _import(path, source, digest, precision="float64"):
    """Run the file's top level as a module (after the static refusals); in float32, the
    file's text rewritten by :func:`livedyn.dsp.precision.rewrite_user` (same lines)."""
    try:
        code = compile(source, str(path), "exec")
    except SyntaxError as e:
        raise UserAlgorithmError(f"{path}:{e.lineno}: syntax error: {e.msg}") from None
    _no_raise(path, source)
    suffix = "" if precision == "float64" else "_f32"
    modname = f"livedyn_user_{re.sub(r'[^0-9A-Za-z_]', '_', path.stem)}_{digest}{suffix}"
    spec = importlib.util.spec_from_file_location(modname, path)
    module = importlib.util.module_from_spec(spec)
    module.Param = user_param  # so that the file needs no import for its own parameters
    if precision != "float64":
        from ..dsp.precision import rewrite_user

        code = rewrite_user(source, path)
    try:
        if precision == "float64":
            spec.loader.exec_module(module)
        else:
            sys.modules[modname] = module
            exec(code, module.__dict__)
            from ..dsp.precision import single

            single(module)
    except Exception as e:  # the user's code raised while being imported
        if type(e).__module__.startswith("numba"):  # e.g. a helper compiled at import
            raise compile_error(path, "a numba function", e) from None
        first = str(e).strip().splitlines()[0] if str(e).strip() else ""
        raise UserAlgorithmError(f"{_where(path, e)}: {type(e).__name__}: {first}",
                                 traceback.format_exc()) from None
    sys.modules[modname] = module
    return module


def _from_module(path, module, digest, precision="float64"):
    from .builtin import Algorithm

    fns = {}
    for stage in STAGES:
        fn = getattr(module, stage, None)
        if fn is not None:
            if not callable(fn):
                raise UserAlgorithmError(f"{path}: {stage} = {fn!r}: expected a function")
            fns[stage] = fn
    if not fns:
        raise UserAlgorithmError(f"{path}: defines none of {', '.join(STAGES)} (expected at "
                                 "least one, e.g. gain_curve(level_db, p))")
    if "kernel" in fns and len(fns) > 1:
        others = ", ".join(s for s in fns if s != "kernel")
        raise UserAlgorithmError(f"{path}: defines kernel and also {others}: a whole kernel "
                                 "replaces the stages; keep one or the other")

    schema, slots = _schema(path, getattr(module, "PARAMS", None), fns,
                            getattr(module, "DEFAULTS", {}))
    module.P = enum.IntEnum("P", slots)
    names, nstate = _state(path, getattr(module, "STATE", 0))
    if names:
        module.S = enum.IntEnum("S", {n: i for i, n in enumerate(names)})
    boost = _flag(path, module, "BOOST")
    block = _count(path, module, "BLOCK", 0, MAX_USER_LATENCY)
    latency = _count(path, module, "LATENCY", 0, MAX_USER_LATENCY)
    if (block or latency) and "kernel" not in fns:
        raise UserAlgorithmError(f"{path}: BLOCK and LATENCY belong to a whole kernel; the "
                                 "built-in stages have no latency of their own")

    name = str(getattr(module, "NAME", path.stem))
    desc = (module.__doc__ or "").strip().splitlines()[0] if module.__doc__ else ""
    needs_key = "key" in schema and int(schema["key"].default) == KEY_EXTERNAL
    common = dict(source=path, state_size=nstate, boost=boost, block=block, latency=latency,
                  stages=tuple(fns), digest=digest, needs_key=needs_key, module=module,
                  precision=precision)
    if "kernel" in fns:
        blk, job = _compile_kernel(path, fns["kernel"], nstate)
        _check_native(path, "kernel", fns["kernel"], job)
        return Algorithm(name, desc or f"user kernel {path.name}", schema, "user", 0,
                         user_block=blk, user_job=job, **common)
    compiled = {stage: _compile_stage(path, stage, fn, nstate, precision)
                for stage, fn in fns.items()}
    for stage, fn in fns.items():
        _check_native(path, stage, fn, compiled[stage])
    law = LAW_USER if "gain_curve" in fns else LAW_COMPRESSOR
    return Algorithm(name, desc or f"user algorithm {path.name}", schema, "dynamics", law,
                     user_curve=compiled.get("gain_curve"),
                     user_detector=compiled.get("detector"),
                     user_smoother=compiled.get("smoother"), **common)


def _no_raise(path, source):
    """Refuse ``raise`` and ``assert`` inside the file's functions: when one fires in compiled
    code on the audio thread, numba takes the interpreter lock to report it."""
    import ast

    for node in ast.walk(ast.parse(source, str(path))):
        if isinstance(node, (ast.FunctionDef, ast.Lambda)):
            for inner in ast.walk(node):
                if isinstance(inner, (ast.Raise, ast.Assert)):
                    what = "raise" if isinstance(inner, ast.Raise) else "assert"
                    raise UserAlgorithmError(
                        f"{path}:{inner.lineno}: refused: {what} in a function: in compiled "
                        "code on the audio thread it would take the interpreter lock; return a "
                        "safe value instead")


def _schema(path, params, fns, defaults):
    if params is None:
        raise UserAlgorithmError(f"{path}: defines no PARAMS list (livedyn's parameter names "
                                 "and Param(...) entries of its own)")
    if isinstance(params, (str, bytes)) or not hasattr(params, "__iter__"):
        raise UserAlgorithmError(f"{path}: PARAMS = {params!r}: expected a list of parameter "
                                 "names and Param(...) entries")
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
            if not entry.lo <= entry.default <= entry.hi:
                raise UserAlgorithmError(f"{path}: PARAMS: {entry.name} default {entry.default:g}"
                                         f" is outside its range {entry.lo:g} to {entry.hi:g}")
            if next_slot >= NPARAM:
                raise UserAlgorithmError(f"{path}: PARAMS: more than {NPARAM - USER_SLOT0} "
                                         "parameters of the file's own")
            prm = Param(**{**entry.__dict__, "slot": next_slot})
            next_slot += 1
        else:
            raise UserAlgorithmError(f"{path}: PARAMS: {entry!r}: expected a parameter name "
                                     "or Param(...)")
        if prm.name in out:
            raise UserAlgorithmError(f"{path}: PARAMS: {prm.name!r} is listed twice")
        out[prm.name] = prm
        slots[prm.name] = prm.slot
    # the built-in stages a file leaves out read these; they appear as controls too
    needed = []
    if "kernel" not in fns:
        if "smoother" not in fns:
            needed += ["attack", "release"]
        if "gain_curve" not in fns:
            needed += ["threshold", "ratio", "knee"]
    for n in needed:
        if n not in out:
            out[n] = ALL[n]
            slots[n] = ALL[n].slot
    if not isinstance(defaults, dict):
        raise UserAlgorithmError(f"{path}: DEFAULTS = {defaults!r}: expected a dict of "
                                 "parameter name to value")
    for n, v in defaults.items():
        if n not in out:
            raise UserAlgorithmError(f"{path}: DEFAULTS: {n!r} is not one of this file's "
                                     f"parameters ({', '.join(out)})")
        try:
            out[n] = out[n].with_default(out[n].parse(v))
        except ParamError as e:
            raise UserAlgorithmError(f"{path}: DEFAULTS: {e}") from None
    slots["samplerate"] = P_SAMPLERATE  # readable by every stage, not a control
    return Schema(out), slots


def _state(path, state):
    if isinstance(state, bool):
        state = None
    if isinstance(state, int):
        if not 0 <= state <= MAX_STATE:
            raise UserAlgorithmError(f"{path}: STATE = {state}: expected 0 to {MAX_STATE} slots "
                                     "per channel")
        return [], state
    if isinstance(state, (list, tuple)) and all(isinstance(s, str) for s in state):
        bad = [s for s in state if not s.isidentifier()]
        if bad or len(set(state)) != len(state) or len(state) > MAX_STATE:
            raise UserAlgorithmError(f"{path}: STATE = {list(state)!r}: expected distinct "
                                     f"identifiers, at most {MAX_STATE}")
        return list(state), len(state)
    raise UserAlgorithmError(f"{path}: STATE = {state!r}: expected a list of names or a number "
                             "of slots per channel")


def _flag(path, module, name):
    v = getattr(module, name, False)
    if not isinstance(v, bool):
        raise UserAlgorithmError(f"{path}: {name} = {v!r}: expected True or False")
    return v


def _count(path, module, name, lo, hi):
    v = getattr(module, name, 0)
    if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
        raise UserAlgorithmError(f"{path}: {name} = {v!r}: expected a whole number of samples "
                                 f"from {lo} to {hi}")
    return v


# ---- compilation ----------------------------------------------------------------------------

_ANSI = re.compile(r"\x1b\[[0-9;]*m")


def _check_native(path, stage, fn, cfunc):
    """Refuse a stage or kernel whose compiled code can reach an allocation, numba's runtime
    or the interpreter lock (the real-time contract; livedyn.dsp.ircheck), naming the file and
    the line where the stage is defined."""
    from ..dsp.ircheck import check_native

    bad = check_native(cfunc)
    if bad:
        code = getattr(getattr(fn, "py_func", fn), "__code__", None)
        line = code.co_firstlineno if code is not None else None
        alloc = [b for b in bad if "NRT_MemInfo_alloc" in b or "NRT_Allocate" in b
                 or b.endswith(("malloc", "calloc", "realloc"))]
        lock = [b for b in bad if "gil_ensure" in b]
        kind = "allocates" if alloc else ("takes the interpreter lock" if lock else
                                          "may raise (which takes the interpreter lock)")
        bad = alloc or lock or bad
        where = f"{path}:{line}" if line else str(path)
        raise UserAlgorithmError(
            f"{where}: {stage} {kind} in the audio thread ({bad[0]}); "
            "the real-time path may not allocate arrays, raise or call Python")


def compile_error(path, what, exc):
    """One line for a numba (or Python) error raised while compiling ``what``: the file and
    line of the user's code when the message names them, and the first line of the reason."""
    text = _ANSI.sub("", str(exc))
    line = ""
    for m in re.finditer(r'File "([^"]+)", line (\d+)', text):
        try:
            if Path(m.group(1)).resolve() == path:
                line = m.group(2)
        except OSError:
            pass
    reason = ""
    lines = [ln.strip() for ln in text.splitlines()]
    for i, s in enumerate(lines):
        if not s or s.startswith(("Failed in ", "During: ", "File ", "- ", "^")) or \
                set(s) <= set("-=^ "):
            continue
        reason = s
        if s.endswith(":"):  # "... found for signature:" -- the signature follows
            nxt = next((t for t in lines[i + 1:] if t), "")
            reason = f"{s} {nxt.removeprefix('>>> ')}"
        break
    reason = reason or type(exc).__name__
    if len(reason) > 160:
        reason = reason[:157] + "..."
    return UserAlgorithmError(f"{_where(path, exc, line)}: {what} does not compile in nopython "
                              f"mode: {reason} (livedyn check {path.name} --full shows the "
                              "compiler's message)", text)


def jit_of(fn, **flags):
    """The user's function compiled with our flags (its Python source when it is already a
    numba dispatcher)."""
    import numba as nb

    py = getattr(fn, "py_func", fn)
    return nb.njit(error_model="numpy", nogil=True, **flags)(py)


def _compile_stage(path, stage, fn, nstate, precision="float64"):
    """A stage as a C-callable ``double fn(double x, double *p[, double *s])``; in float32 the
    stage receives ``x`` as a float32 (its own arithmetic is single precision, see
    :func:`livedyn.dsp.precision.rewrite_user`) and the kernel rounds its result to float32."""
    import numba as nb
    from numba import carray, types

    jit = jit_of(fn)
    f64p = types.CPointer(types.float64)
    real = np.float32 if precision == "float32" else np.float64
    try:
        if stage == "gain_curve":
            def wrapper(x, pp):
                return jit(real(x), carray(pp, (NPARAM,)))

            sig = types.float64(types.float64, f64p)
        else:
            def wrapper(x, pp, sp):
                return jit(real(x), carray(pp, (NPARAM,)), carray(sp, (nstate,)))

            sig = types.float64(types.float64, f64p, f64p)
        return nb.cfunc(sig, nopython=True, error_model="numpy")(wrapper)
    except Exception as e:
        raise compile_error(path, stage, e) from None


def _compile_kernel(path, fn, nstate):
    """The file's kernel wrapped to livedyn's kernel contract, and as a live job function."""
    import numba as nb
    from numba import carray, types

    from ..dsp.layout import NROWS, S_FRAMES, T_KEY
    from ..dsp.abi import job_function
    from ..dsp.intrinsics import int_to_voidptr

    jit = jit_of(fn)

    def block(x, key, out, p, st, ring, tr):
        ncols = st.shape[1]
        # rows NROWS on as a (ncols, nstate) block, a view made without reshape (which can
        # fail, and so raise, in compiled code)
        s = carray(int_to_voidptr(st.ctypes.data + 8 * NROWS * ncols), (ncols, nstate),
                   np.float64)
        jit(x, key, out, p, s)
        st[S_FRAMES, 0] += x.shape[0]
        if tr.shape[1] >= x.shape[0]:  # the key as the kernel saw it, for monitoring
            nk = min(key.shape[1], tr.shape[2])
            for n in range(x.shape[0]):
                for c in range(nk):
                    tr[T_KEY, n, c] = key[n, c]

    f32 = types.Array(types.float32, 2, "C")
    sig = (f32, f32, f32, types.Array(types.float64, 1, "C"),
           types.Array(types.float64, 2, "C"), types.Array(types.float64, 2, "C"),
           types.Array(types.float64, 3, "C"))
    try:
        blk = nb.njit(nogil=True, error_model="numpy")(block)
        blk.compile(sig)
        blk.disable_compile()

        cf = job_function(blk)
    except Exception as e:
        raise compile_error(path, "kernel", e) from None
    return blk, cf
