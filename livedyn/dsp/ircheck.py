"""Which calls a numba cfunc's compiled code can reach: the check that keeps the interpreter
lock, allocation and numba's runtime out of the audio thread.

numba's cfunc wrapper calls the inner function and, when the returned status is not 0, takes
the interpreter lock (``numba_gil_ensure``) to raise or report the error. The wrapper therefore
always contains a lock call; it is dead exactly when every status along the chain is the
constant 0. :class:`IRModule` propagates constants through the LLVM IR numba emits (numba's
cfunc wrapper and calling convention as found in numba 0.68's output) and checks only what is
reachable. :func:`check_native` runs it on a compiled cfunc: livedyn runs it at load on every
user stage and kernel, and the tests run it on the callback compiled afresh.

Functions of livedyn itself that a user's code calls and that numba loaded from its cache
appear only as declarations (their IR is not kept): they are trusted here, with a status of 0,
because the tests scan them compiled from source.
"""
import re

_ID = r'(?:"[^"]*"|[-\w.$]+)'
_NAME_RE = re.compile(r"@(" + _ID + r")\(")
_LABEL_RE = re.compile(r"^(" + _ID + r"):")
_DEF_RE = re.compile(r"^\s*(%" + _ID + r") = (.*)$")
_CALL_RE = re.compile(r"\b(?:call|invoke)\b[^@%]*?([@%]" + _ID + r")\(")
_GLOBAL_RE = re.compile(r"@(" + _ID + r")")
TOP = None  # "any value"

# External functions the callback may reach: LLVM intrinsics (llvm.*), the vDSO clock, and libm
# functions (pure computations: no lock, no allocation), in double and single precision (the
# C99 names with an f suffix: the float32 variants call those).
_LIBM = {"sqrt", "exp", "log", "log10", "pow", "sin", "cos", "tan", "atan2", "floor", "ceil",
         "fmod", "log1p", "expm1", "hypot", "tanh", "exp2", "log2", "atan", "asin", "acos",
         "sinh", "cosh", "cbrt"}
ALLOWED_EXTERNAL = {"clock_gettime"} | _LIBM | {f + "f" for f in _LIBM}


def _split_top(text):
    """Split at commas outside (), [], {} and <>."""
    out, depth, cur = [], 0, []
    for ch in text:
        if ch in "([{<":
            depth += 1
        elif ch in ")]}>":
            depth -= 1
        if ch == "," and depth == 0:
            out.append("".join(cur).strip())
            cur = []
        else:
            cur.append(ch)
    if "".join(cur).strip():
        out.append("".join(cur).strip())
    return out


def _paren_body(text, start):
    depth = 0
    for i in range(start, len(text)):
        if text[i] == "(":
            depth += 1
        elif text[i] == ")":
            depth -= 1
            if depth == 0:
                return text[start + 1:i]
    raise ValueError(f"unbalanced parenthesis in {text[:80]!r}")


def _last(arg):
    parts = arg.split()
    return parts[-1] if parts else ""


def _short(name):
    """'cfunc livedyn.engine.callback.block_body' from numba's mangled symbol."""
    pre = "cfunc " if name.startswith("cfunc.") else ""
    s = name[len("cfunc."):] if pre else name
    if not s.startswith("_ZN"):
        return name
    i, parts = 3, []
    while i < len(s) and s[i].isdigit():
        j = i
        while s[j].isdigit():
            j += 1
        n = int(s[i:j])
        parts.append(s[j:j + n])
        i = j + n
    return pre + ".".join(parts)


def _icmp(pred, x, y):
    if pred == "eq":
        return int(x == y)
    if pred == "ne":
        return int(x != y)
    if not (isinstance(x, int) and isinstance(y, int)):
        return None
    if pred.startswith("u") and (x < 0 or y < 0):
        return None
    ops = {"gt": x > y, "ge": x >= y, "lt": x < y, "le": x <= y}
    return int(ops[pred[1:]]) if pred[1:] in ops else None


class _IRFunction:
    def __init__(self, header, body):
        m = _NAME_RE.search(header)
        self.name = m.group(1)
        self.params = [_last(a) for a in _split_top(_paren_body(header, m.end() - 1))]
        self.blocks, self.order, self.defs = {}, [], {}
        label, pending = "<entry>", None
        for line in body:
            if not line.strip() or line.lstrip().startswith(";"):
                continue
            lm = _LABEL_RE.match(line)
            if lm and not line.startswith(" "):
                label = lm.group(1)
                continue
            if pending is not None:  # a switch's case list spans lines up to "]"
                pending += " " + line.strip()
                if line.strip().startswith("]"):
                    self._add(label, pending)
                    pending = None
                continue
            if line.rstrip().endswith("[") and line.strip().startswith("switch "):
                pending = line.strip()
                continue
            self._add(label, line.strip())

    def _add(self, label, ins):
        if label not in self.blocks:
            self.blocks[label] = []
            self.order.append(label)
        self.blocks[label].append(ins)
        d = _DEF_RE.match(ins)
        if d:
            self.defs[d.group(1)] = d.group(2)

    @property
    def numba_convention(self):
        # numba's internal functions return an int32 status (0: fine; anything else: an
        # exception for the caller to raise) and pass the result through %retptr / %excinfo
        return "%excinfo" in self.params


class IRModule:
    """What a numba cfunc's LLVM module can reach, with constant status codes propagated.

    numba's cfunc wrapper calls the inner function and, when the returned status is not 0,
    takes the interpreter lock (``numba_gil_ensure``) to raise or report the error. So the
    wrapper does contain a GIL call; it is dead code exactly when every status return along the
    chain is the constant 0. The scan therefore propagates constants: each function's possible
    return values are worked out per calling context (arguments known to be constant, such as
    the null "meminfo" pointer of a carray view), branches on known conditions are followed one
    way only, and only what is reachable that way is checked. A function that can return a
    status other than 0 is itself a violation, so nothing is merely ignored. ``prune=False``
    follows every branch (used to show that the pruning is what removes the wrapper's GIL path).
    """

    def __init__(self, text, prune=True, trusted=(), refcounts=False):
        self.functions, self.declared = {}, set()
        self.prune = prune
        self.refcounts = refcounts
        self.trusted = tuple(trusted)
        cur = None
        for line in text.splitlines():
            if cur is not None:
                if line.startswith("}"):
                    f = _IRFunction(cur[0], cur[1:])
                    self.functions[f.name] = f
                    cur = None
                else:
                    cur.append(line)
            elif line.startswith("define "):
                cur = [line]
            elif line.startswith("declare "):
                self.declared.add(_NAME_RE.search(line).group(1))
        self._memo, self._busy = {}, set()

    @property
    def entry(self):
        names = [n for n in self.functions if n.startswith("cfunc.")]
        if len(names) != 1:
            raise ValueError(f"expected the IR of one cfunc, found {len(names)}: {names}")
        return names[0]

    # ---- values: a frozenset of possible constants (ints, 'null'), or TOP --------------------
    def operand(self, f, ctx, tok, seen):
        tok = tok.strip()
        if tok == "null":
            return frozenset(["null"])
        if tok in ("true", "false"):
            return frozenset([int(tok == "true")])
        if re.fullmatch(r"-?\d+", tok):
            return frozenset([int(tok)])
        if tok.startswith("%"):
            return self.value(f, ctx, tok, seen)
        return TOP

    def value(self, f, ctx, var, seen):
        if var in f.params:
            return ctx[f.params.index(var)]
        rhs = f.defs.get(var)
        if rhs is None:
            return TOP
        if var in seen:
            return frozenset()  # a loop back to itself adds no new value
        seen = seen | {var}
        op = rhs.split()[0]
        if op == "icmp":
            m = re.match(r"icmp (\w+) \S+ (\S+), (\S+)", rhs)
            a = self.operand(f, ctx, m.group(2), seen) if m else TOP
            b = self.operand(f, ctx, m.group(3), seen) if m else TOP
            if a is TOP or b is TOP:
                return TOP
            res = {_icmp(m.group(1), x, y) for x in a for y in b}
            return TOP if None in res else frozenset(res)
        if op == "phi":
            res = set()
            for v in re.findall(r"\[\s*([^,\]]+),\s*%" + _ID + r"\s*\]", rhs):
                s = self.operand(f, ctx, v, seen)
                if s is TOP:
                    return TOP
                res |= s
            return frozenset(res)
        if op == "select":
            parts = _split_top(rhs[len("select"):])
            if len(parts) != 3:
                return TOP
            c, a, b = (self.operand(f, ctx, _last(p), seen) for p in parts)
            if c == frozenset([1]):
                return a
            if c == frozenset([0]):
                return b
            return TOP if (a is TOP or b is TOP) else a | b
        if op in ("xor", "and", "or") and rhs.split()[1] == "i1":
            a, b = (self.operand(f, ctx, p, seen) for p in _split_top(rhs.split(None, 2)[2]))
            if a is TOP or b is TOP or len(a) != 1 or len(b) != 1:
                return TOP
            x, y = next(iter(a)), next(iter(b))
            return frozenset([{"xor": x ^ y, "and": x & y, "or": x | y}[op]])
        if op in ("zext", "sext"):
            return self.operand(f, ctx, rhs.split()[2], seen)
        m = _CALL_RE.search(rhs)
        if m and m.group(1)[1:] in self.functions:
            return self.analyze(m.group(1)[1:], self._args(f, ctx, rhs, m, seen))["returns"]
        if m and self._trusted(m.group(1)[1:]):
            return frozenset([0])
        return TOP

    def _trusted(self, name):
        return bool(self.trusted) and name not in self.functions and \
            _short(name).replace("cfunc ", "").startswith(self.trusted)

    def _args(self, f, ctx, ins, m, seen):
        return tuple(self.operand(f, ctx, _last(a), seen)
                     for a in _split_top(_paren_body(ins, m.end() - 1)))

    def _ctx(self, name, ctx):
        n = len(self.functions[name].params)
        ctx = tuple(ctx or ())
        return ctx[:n] + (TOP,) * (n - len(ctx))

    # ---- one function in one calling context -------------------------------------------------
    def analyze(self, name, ctx=None):
        f = self.functions[name]
        key = (name, self._ctx(name, ctx))
        ctx = key[1]
        if key in self._memo:
            return self._memo[key]
        if key in self._busy:  # recursion: claim nothing about the result
            return {"returns": TOP, "calls": []}
        self._busy.add(key)
        reached, work = set(), [f.order[0]]
        while work:
            b = work.pop()
            if b not in reached:
                reached.add(b)
                work.extend(self._successors(f, ctx, f.blocks[b][-1]))
        returns, calls = set(), []
        for b in f.order:
            if b not in reached:
                continue
            for ins in f.blocks[b]:
                if ins.startswith("ret "):
                    if ins.split()[1] == "void":
                        returns.add("void")
                    else:
                        v = self.operand(f, ctx, ins.split()[-1], frozenset())
                        returns = TOP if (v is TOP or returns is TOP) else returns | v
                m = _CALL_RE.search(ins)
                callee = None
                if m:
                    callee = m.group(1)
                    if callee.startswith("%"):
                        calls.append(("<indirect>", None, ins))
                    else:
                        callee = callee[1:]
                        actx = (self._args(f, ctx, ins, m, frozenset())
                                if callee in self.functions else None)
                        calls.append((callee, actx, ins))
                for g in _GLOBAL_RE.findall(ins):  # a function whose address is taken
                    if g != callee and (g in self.functions or g in self.declared
                                        or g.startswith(("Py", "_Py"))):
                        calls.append((g, None, ins))
        res = {"returns": TOP if returns is TOP else frozenset(returns), "calls": calls}
        self._busy.discard(key)
        self._memo[key] = res
        return res

    def _successors(self, f, ctx, term):
        labels = re.findall(r"label %(" + _ID + r")", term)
        if not self.prune:
            return labels
        m = re.match(r"br i1 (\S+), label %(" + _ID + r"), label %(" + _ID + r")", term)
        if m:
            c = self.operand(f, ctx, m.group(1), frozenset())
            if c == frozenset([1]):
                return [m.group(2)]
            if c == frozenset([0]):
                return [m.group(3)]
            return [m.group(2), m.group(3)]
        m = re.match(r"switch \S+ (\S+), label %(" + _ID + r") \[(.*)\]", term)
        if m:
            v = self.operand(f, ctx, m.group(1), frozenset())
            if v is TOP or not all(isinstance(x, int) for x in v):
                return labels
            cases = {int(k): lab for k, lab in
                     re.findall(r"\S+ (-?\d+), label %(" + _ID + r")", m.group(3))}
            return [cases.get(x, m.group(2)) for x in v]
        if term.startswith(("ret ", "unreachable")):
            return []
        return labels

    # ---- the whole chain ---------------------------------------------------------------------
    def scan(self):
        """From the cfunc entry: functions reached, external calls, indirect calls, violations."""
        seen, work = set(), [(self.entry, None)]
        externals, indirect, violations = set(), 0, set()
        while work:
            name, ctx = work.pop()
            key = (name, self._ctx(name, ctx))
            if key in seen:
                continue
            seen.add(key)
            res = self.analyze(name, ctx)
            if self.functions[name].numba_convention and res["returns"] != frozenset([0]):
                what = "unknown" if res["returns"] is TOP else sorted(res["returns"], key=str)
                violations.add(f"{_short(name)} may return status {what}")
            for callee, actx, _ in res["calls"]:
                if callee == "<indirect>":
                    indirect += 1
                elif self.refcounts and callee in _REFCOUNT:
                    continue
                elif callee in self.functions:
                    work.append((callee, actx))
                elif self._trusted(callee):
                    continue
                else:
                    externals.add(callee)
                    if not (callee.startswith("llvm.") or callee in ALLOWED_EXTERNAL):
                        violations.add(f"{_short(name)} uses {callee}")
        return {"functions": sorted({_short(n) for n, _ in seen}), "externals": sorted(externals),
                "indirect_calls": indirect, "violations": sorted(violations)}


FORBIDDEN = re.compile(r"^(_?Py|numba_|NRT_|malloc$|free$|calloc$|realloc$|posix_memalign$)")


# numba's reference counting of array views. Every array on the audio thread is a view made by
# carray (no meminfo: the count is never touched), so these are no-ops there unless an array
# was allocated on the audio thread, which is itself refused. User code that slices or reshapes
# arrays reaches them; the callback's own code is checked without this allowance.
_REFCOUNT = {"NRT_incref", "NRT_decref"}


def check_native(cfunc, trusted=("livedyn.",)):
    """Violations of the real-time contract reachable from a compiled numba cfunc: a list of
    one-line reasons (empty when clean). Calls into ``trusted`` modules are not followed;
    reference counting of views is allowed (see ``_REFCOUNT``)."""
    r = IRModule(cfunc.inspect_llvm(), trusted=trusted, refcounts=True).scan()
    return r["violations"] + [f"calls {e}" for e in r["externals"]
                              if FORBIDDEN.match(e) and not any(
                                  f"uses {e}" in v for v in r["violations"])]
