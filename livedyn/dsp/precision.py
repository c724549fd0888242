"""Single-precision variants of the kernels, made from their float64 source.

The float64 kernels in :mod:`.stages`, :mod:`.dynamics`, :mod:`.limiter` and :mod:`.truepeak`
are the source of truth. Their float32 variants are the same source, rewritten so that every
computation happens in single precision:

* every float literal inside a function becomes ``float32(literal)`` (``math.pi`` too);
* every read of a float array element (the parameter array ``p``, the state ``st``, the delay
  line ``ring``, the true-peak taps) becomes ``float32(...)``, except the slots that hold exact
  integers (counters, positions, deque indices, the hold count, the user stages' addresses) and
  the parameters that become whole sample counts (lookahead and hold, so that the latency a
  float32 processor reports is the float64 one);
* module-level float constants (``LN10_OVER_20``, ``GLIDE_MS``, ...) become float32 values;
* the results of the calls to a user stage (:mod:`.calls`) become float32.

numba then types the arithmetic as float32 and calls the single-precision math functions
(``expf``, ``logf``, ...). The state arrays keep their float64 layout (the kernel contract and
the callback's job block are unchanged), but every value the float32 kernel stores there is a
float32 value, so the state holds single-precision numbers. ``tests/test_precision.py`` checks
that the typed float32 kernels hold no float64 variable other than the exact ones listed in
``EXACT_LOCALS``.

The rewritten modules are written into the user cache folder (a folder per hash of the dsp
sources, so that an edit never reuses a stale variant) and imported from there, so that numba
caches their machine code beside them like the float64 kernels'.
"""
from __future__ import annotations

import ast
import hashlib
import importlib.util
import os
import sys
import tempfile
from pathlib import Path

import numpy as np

PRECISIONS = ("float64", "float32")

#: The modules rewritten for float32, in import order (each imports only those before it).
MODULES = ("truepeak", "stages", "dynamics", "limiter")

#: Element reads left in float64: slots that hold exact integers or addresses.
EXACT_INDEX = frozenset({
    # st scalars and rows: flags, counters, positions, lengths, deque indices, hold counts
    "S_READY", "S_NONFINITE", "S_DCUR", "S_DOLD", "S_XF", "S_WPOS", "S_FRAMES", "S_CLAMP",
    "S_ATT", "S_LOOK", "S_LIM_NGAIN", "S_LIM_TP", "R_HOLD", "R_DQ_HEAD", "R_DQ_LEN",
    "R_TP_POS",
    # parameters that become whole sample counts, and the addresses of user stages
    "P_LOOKAHEAD", "P_HOLD", "P_USER_CURVE", "P_USER_DETECTOR", "P_USER_SMOOTHER", "P_LAW",
    "P_KEY", "P_LINK", "P_DETECTOR", "P_BALLISTICS", "P_DOMAIN", "P_TOPOLOGY", "P_START",
    "P_TRUE_PEAK",
    # ring columns holding deque indices
    "RING_DQ_IDX",
})

#: Local variables of the float32 kernels that stay float64 on purpose: they carry exact
#: counts (samples of a crossfade, non-finite samples) or the parameters listed above.
EXACT_LOCALS = frozenset({"nonfinite", "xf", "xf_len", "hold_n", "clamps", "frame0", "t"})

_CALLS_TO_F32 = frozenset({"call_curve", "call_stage"})


def check(precision) -> str:
    """``precision`` as one of PRECISIONS, or ValueError (one line)."""
    from ..params import ParamError

    p = str(precision).strip().lower()
    aliases = {"64": "float64", "f64": "float64", "double": "float64",
               "32": "float32", "f32": "float32", "single": "float32", "float": "float32"}
    p = aliases.get(p, p)
    if p not in PRECISIONS:
        raise ParamError(f"precision = {precision!r}: expected float64 or float32")
    return p


class _ToFloat32(ast.NodeTransformer):
    """The rewrite described in the module docstring (functions only; module level is
    converted after import)."""

    def __init__(self):
        self.depth = 0

    @staticmethod
    def _f32(node):
        return ast.copy_location(
            ast.Call(func=ast.Name(id="_ld_f32", ctx=ast.Load()), args=[node], keywords=[]),
            node)

    def visit_FunctionDef(self, node):
        # decorators and default values stay as written
        self.depth += 1
        node.body = [self.visit(s) for s in node.body]
        self.depth -= 1
        return node

    def visit_Constant(self, node):
        if self.depth and isinstance(node.value, float):
            return self._f32(node)
        return node

    def visit_Call(self, node):
        self.generic_visit(node)
        if self.depth and isinstance(node.func, ast.Name) and node.func.id in _CALLS_TO_F32:
            return self._f32(node)
        if (self.depth and isinstance(node.func, ast.Name) and node.func.id == "float"
                and len(node.args) == 1 and not node.keywords):
            node.func = ast.Name(id="_ld_f32", ctx=ast.Load())  # float(v): this precision's
        return node

    def visit_Attribute(self, node):
        self.generic_visit(node)
        if (self.depth and isinstance(node.ctx, ast.Load) and isinstance(node.value, ast.Name)
                and node.value.id in ("math", "np", "numpy") and node.attr in ("pi", "e", "tau")):
            return self._f32(node)
        return node

    def _exact(self, index):
        names = {n.id for n in ast.walk(index) if isinstance(n, ast.Name)}
        return bool(names & EXACT_INDEX)

    def visit_Subscript(self, node):
        self.generic_visit(node)
        if not self.depth or not isinstance(node.ctx, ast.Load):
            return node
        base = node.value
        if not isinstance(base, ast.Name):
            return node
        if base.id in ("x", "key", "out"):
            return node  # float32 already
        if isinstance(node.slice, ast.Slice) or (
                isinstance(node.slice, ast.Tuple)
                and any(isinstance(e, ast.Slice) for e in node.slice.elts)):
            return node  # a view, not an element
        if self._exact(node.slice):
            return node
        return self._f32(node)

    def visit_AugAssign(self, node):
        # ``st[i, j] += v`` reads the element too: rewrite as ``st[i, j] = st[i, j] + v``
        if self.depth and isinstance(node.target, ast.Subscript):
            load = ast.Subscript(value=node.target.value, slice=node.target.slice,
                                 ctx=ast.Load())
            ast.copy_location(load, node.target)
            new = ast.Assign(targets=[node.target],
                             value=ast.BinOp(left=self.visit(load), op=node.op,
                                             right=self.visit(node.value)))
            ast.copy_location(new, node)
            ast.copy_location(new.value, node)
            return new
        self.generic_visit(node)
        return node


def rewrite(source, modules=None, single=True, transform=None):
    """``source`` (a module's text) rewritten for float32 (``single``; otherwise only its
    imports); ``modules`` maps a relative import (``".stages"``) to the absolute module name to
    import instead; ``transform`` (an ast.NodeTransformer) runs first."""
    tree = ast.parse(source)
    if transform is not None:
        tree = transform.visit(tree)
    if single:
        tree = _ToFloat32().visit(tree)
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.level:
            rel = "." * node.level + (node.module or "")
            if modules and rel in modules:
                node.module, node.level = modules[rel], 0
            else:
                node.module = _absolute(rel)
                node.level = 0
    _insert_head(tree)
    return ast.unparse(tree) + "\n"


def _insert_head(tree):
    """``_ld_f32 = numpy.float32`` at the top of a module, after its docstring and any
    ``from __future__`` import (on line 1: the file's own lines keep their numbers)."""
    head = ast.parse("import numpy as _ld_np\n_ld_f32 = _ld_np.float32\n").body
    for h in head:
        for n in ast.walk(h):
            n.lineno = n.end_lineno = 1
            n.col_offset = n.end_col_offset = 0
    body = list(tree.body)
    i = 0
    while i < len(body) and (
            (isinstance(body[i], ast.Expr) and isinstance(getattr(body[i], "value", None),
                                                          ast.Constant))
            or (isinstance(body[i], ast.ImportFrom) and body[i].module == "__future__")):
        i += 1
    tree.body = body[:i] + head + body[i:]
    ast.fix_missing_locations(tree)


class _NoCache(ast.NodeTransformer):
    """``cache=True`` in a decorator becomes False: a variant's helper must never load the
    float64 machine code numba cached for the same function of the same file."""

    def visit_keyword(self, node):
        if node.arg == "cache":
            node.value = ast.copy_location(ast.Constant(False), node.value)
        return node


def rewrite_user(source, path):
    """The code object of a user algorithm file rewritten for float32 (the rewrite of
    :func:`rewrite`, every float array read included), compiled under the file's own name
    with its own line numbers, so that errors and tracebacks point into the user's file.
    Imports of livedyn's dsp modules take their float32 variants."""
    tree = ast.parse(source, str(path))
    for fn in ast.walk(tree):
        if isinstance(fn, ast.FunctionDef):
            fn.decorator_list = [_NoCache().visit(d) for d in fn.decorator_list]
    tree = _ToFloat32().visit(tree)
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            parts = node.module.split(".")
            if parts[:2] == ["livedyn", "dsp"] and len(parts) == 3 and parts[2] in MODULES:
                node.module = module32(parts[2]).__name__
    _insert_head(tree)
    return compile(tree, str(path), "exec")


def _absolute(rel):
    """A relative import of a module in livedyn/dsp as an absolute name."""
    level = len(rel) - len(rel.lstrip("."))
    rest = rel.lstrip(".")
    base = ["livedyn", "dsp"][:3 - level] if level <= 2 else []
    return ".".join(base + ([rest] if rest else []))


def single(module):
    """Every float (and float64) value at a module's top level becomes a float32 value."""
    for name, v in list(vars(module).items()):
        if type(v) in (float, np.float64):
            setattr(module, name, np.float32(v))


def _digest():
    here = Path(__file__).resolve().parent
    h = hashlib.sha256()
    for f in sorted(list(here.glob("*.py")) + [here.parent / "params.py"]):
        h.update(f.name.encode())
        h.update(f.read_bytes())
    return h.hexdigest()[:16]


_LOADED = {}


_FOLDERS = {}


def _folder(kind="float32"):
    """The cache folder of generated modules of ``kind`` for these dsp sources."""
    if kind not in _FOLDERS:
        _FOLDERS[kind] = _make_folder(kind)
    return _FOLDERS[kind]


def _make_folder(kind):
    from ..shipped import cache_folder

    d = cache_folder(kind, _digest())
    try:
        d.mkdir(parents=True, exist_ok=True)
        probe = d / f".probe-{os.getpid()}"
        probe.write_text("")
        probe.unlink()
        return d
    except OSError:  # no writable cache: a private folder (compiled again next run)
        return Path(tempfile.mkdtemp(prefix=f"livedyn-{kind}-"))


def _write_if_changed(path, text):
    """Write ``text`` unless the file holds it already (numba's cache keys on the file's
    modification time); atomically, so that two processes never see half a file."""
    try:
        if path.read_text(encoding="utf-8") == text:
            return
    except OSError:
        pass
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)


def module_text(name, precision, transform=None):
    """The text of ``livedyn.dsp.<name>`` (one of MODULES) in ``precision``, importing the
    float32 variants of its siblings in float32 (made first) and livedyn's own modules by
    absolute name; ``transform`` (an ast.NodeTransformer) is applied first. For the variant
    modules of :mod:`livedyn.dsp.variants`."""
    if name not in MODULES:
        raise ValueError(f"no generated variant of {name!r}")
    here = Path(__file__).resolve().parent
    source = (here / f"{name}.py").read_text(encoding="utf-8")
    if precision == "float64":
        return rewrite(source, single=False, transform=transform)
    modules = {f".{dep}": module32(dep).__name__ for dep in MODULES[:MODULES.index(name)]}
    return rewrite(source, modules, transform=transform)


def import_text(folder, modname, text, to_single):
    """Write ``text`` as ``folder/modname.py`` (unless it holds it already) and import it; its
    top-level floats become float32 when ``to_single``."""
    path = folder / f"{modname}.py"
    _write_if_changed(path, text)
    spec = importlib.util.spec_from_file_location(modname, path)
    mod = importlib.util.module_from_spec(spec)
    sys.modules[modname] = mod
    spec.loader.exec_module(mod)
    if to_single:
        single(mod)
    return mod


def module32(name):
    """The float32 variant of ``livedyn.dsp.<name>`` (one of MODULES), made on first use."""
    if name in _LOADED:
        return _LOADED[name]
    if name not in MODULES:
        raise ValueError(f"no float32 variant of {name!r}")
    folder = _folder()
    modname = f"livedyn_f32_{folder.name}_{name}"
    mod = import_text(folder, modname, module_text(name, "float32"), True)
    _LOADED[name] = mod
    return mod


_JOBS = """\"\"\"Job functions of the float32 kernels (written by livedyn.dsp.precision).\"\"\"
import numba as nb
import numpy as np
from numba import carray

from livedyn.dsp.abi import JOB_SIG, JOB_SIZE, job_arrays
from {dynamics} import dynamics_block
from {limiter} import limiter_block


@nb.cfunc(JOB_SIG, nopython=True, error_model="numpy", cache=True)
def job_dynamics(jp):
    x, k, y, p, st, ring, tr = job_arrays(carray(jp, (JOB_SIZE,), np.int64))
    dynamics_block(x, k, y, p, st, ring, tr)


@nb.cfunc(JOB_SIG, nopython=True, error_model="numpy", cache=True)
def job_limiter(jp):
    x, k, y, p, st, ring, tr = job_arrays(carray(jp, (JOB_SIZE,), np.int64))
    limiter_block(x, k, y, p, st, ring, tr)
"""


def job_for(kind, precision="float64"):
    """The callback's job function (``void fn(void *job)``) of the kernel of ``kind`` in
    ``precision``: the same job block and state layout in both."""
    precision = check(precision)
    if precision == "float64":
        from . import abi

        return abi.job_limiter if kind == "limiter" else abi.job_dynamics
    if "jobs" not in _LOADED:
        dyn, lim = module32("dynamics"), module32("limiter")
        folder = Path(dyn.__file__).parent
        _LOADED["jobs"] = import_text(folder, f"livedyn_f32_{folder.name}_jobs",
                                      _JOBS.format(dynamics=dyn.__name__, limiter=lim.__name__),
                                      False)
    jobs = _LOADED["jobs"]
    return jobs.job_limiter if kind == "limiter" else jobs.job_dynamics


def kernel_for(kind, precision="float64"):
    """The fused kernel of ``kind`` ("dynamics" or "limiter") in ``precision``."""
    precision = check(precision)
    if precision == "float64":
        from . import kernel_for as k64

        return k64(kind)
    if kind == "dynamics":
        return module32("dynamics").dynamics_block
    if kind == "limiter":
        return module32("limiter").limiter_block
    raise ValueError(f"no kernel of kind {kind!r}")
