"""livedyn's import graph keeps its layers (DEVELOPERS.md, "The layers").

Every ``import`` and ``from ... import`` of a livedyn module in every file of ``livedyn/`` is
read with :mod:`ast` (function-level imports included: a lazy import is an arrow too), and the
graph of module -> module must have no cycle and no arrow from a lower layer to a higher one.
"""
from __future__ import annotations

import ast
from pathlib import Path

import livedyn

PKG = Path(livedyn.__file__).resolve().parent

# The layers, bottom first (DEVELOPERS.md, "The layers"). A module belongs to the layer of the
# longest prefix listed here; a module may import its own layer and the ones below.
LAYERS = [
    ("bottom", ["livedyn.files", "livedyn.shipped", "livedyn.params", "livedyn.outputs",
                "livedyn.limits"]),
    ("kernels", ["livedyn.dsp"]),
    ("algorithms and Processor", ["livedyn.algorithms", "livedyn.processor"]),
    ("loader", ["livedyn.checks", "livedyn.loader", "livedyn.vet"]),
    ("offline", ["livedyn.render", "livedyn.analysis", "livedyn.presets", "livedyn.meters",
                 "livedyn.wavio", "livedyn.automation", "livedyn.demo", "livedyn.port",
                 "livedyn.audit"]),
    ("engine", ["livedyn.engine"]),
    ("control", ["livedyn.control"]),
    ("console", ["livedyn.console"]),
    ("bench and readiness", ["livedyn.bench", "livedyn.readiness"]),
    ("command line", ["livedyn.cli", "livedyn.__main__", "livedyn"]),
]

# Arrows that may point up: none (the callback's job ABI and its last stage live in
# dsp/abi.py, below both the algorithms and the engine).
PENDING_UP: set = set()


def module_name(path: Path) -> str:
    rel = path.relative_to(PKG.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def modules() -> dict:
    return {module_name(p): p for p in sorted(PKG.rglob("*.py"))}


def imports_of(name: str, path: Path, known: set) -> set:
    """The livedyn modules that ``name`` (at ``path``) imports."""
    tree = ast.parse(path.read_text(encoding="utf-8"), str(path))
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for a in node.names:
                if a.name == "livedyn" or a.name.startswith("livedyn."):
                    out.add(_known(a.name, known))
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[:len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if not (target == "livedyn" or target.startswith("livedyn.")):
                continue
            for a in node.names:  # `from . import presets` names a module
                sub = f"{target}.{a.name}"
                out.add(sub if sub in known else _known(target, known))
    out.discard(name)
    return out


def _known(dotted: str, known: set) -> str:
    while dotted not in known and "." in dotted:
        dotted = dotted.rpartition(".")[0]
    return dotted


def layer_of(name: str) -> int:
    best, rank = -1, None
    for i, (_, prefixes) in enumerate(LAYERS):
        for p in prefixes:
            if (name == p or name.startswith(p + ".")) and len(p) > best:
                best, rank = len(p), i
    assert rank is not None, f"{name}: in no layer; add it to LAYERS and to DEVELOPERS.md"
    return rank


def graph() -> dict:
    mods = modules()
    known = set(mods)
    return {n: imports_of(n, p, known) for n, p in mods.items()}


def test_every_module_has_a_layer():
    for name in modules():
        layer_of(name)


def test_no_upward_arrows():
    up = set()
    for a, targets in graph().items():
        for b in targets:
            if layer_of(b) > layer_of(a):
                up.add((a, b))
    unexpected = sorted(up - PENDING_UP)
    assert not unexpected, "upward imports: " + ", ".join(
        f"{a} ({LAYERS[layer_of(a)][0]}) -> {b} ({LAYERS[layer_of(b)][0]})" for a, b in unexpected)
    gone = sorted(PENDING_UP - up)
    assert not gone, f"no longer imported, remove from PENDING_UP: {gone}"


def test_no_cycles():
    g = graph()
    # Tarjan's strongly connected components (R. Tarjan, "Depth-first search and linear graph
    # algorithms", SIAM J. Comput. 1(2), 1972); a component of more than one module is a cycle.
    index, low, stack, on, comps = {}, {}, [], set(), []
    counter = [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in sorted(g.get(v, ())):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            comps.append(comp)

    for v in sorted(g):
        if v not in index:
            visit(v)
    cycles = [sorted(c) for c in comps if len(c) > 1]
    assert not cycles, f"import cycles: {cycles}"


def test_the_walker_sees_known_arrows():
    # The walker itself: arrows that exist in the code today, lazy ones included.
    g = graph()
    assert "livedyn.processor" in g["livedyn.checks"]
    assert "livedyn.checks" in g["livedyn.loader"]
    assert "livedyn.files" in g["livedyn.wavio"]
    assert "livedyn.loader" in g["livedyn.engine.watch"]  # imported inside a method
    assert "livedyn.dsp.layout" in g["livedyn.processor"]
