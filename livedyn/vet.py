"""Vetting a user algorithm file in a child process, so that its code cannot take livedyn down.

An algorithm file is Python that runs with the user's permissions. Its code first runs in
children forked from this process, each with a time limit and a cap on its address space:
:func:`vet_import` runs the file's top level; once this process has compiled the file (which
runs none of its code), :func:`vet_checks` runs the load-time checks
(:mod:`livedyn.checks`) on the compiled stages the child inherits. Forking after
numba is imported and the file compiled keeps a child's start cheap: nothing is compiled twice
but the checks' own bounds-checked copies. A file that hangs, crashes (a segfaulting write), exits
(``sys.exit``, ``os._exit``), exhausts memory or fails a check is refused with one line naming
the file and what happened; the parent, and a stream it is playing, are not disturbed. The
child's report is kept; the checks do not run again in the parent.

POSIX only (``os.fork``); elsewhere the checks run in the process itself.
"""
from __future__ import annotations

import json
import os
import select
import signal
import time

__all__ = ["vet_import", "vet_checks", "VET_SECONDS", "VET_MEMORY", "VetResult"]

#: Time limit of the child: compiling a whole kernel and running every check takes a few
#: seconds here; a file that needs more is refused (a choice of ours, no source).
VET_SECONDS = float(os.environ.get("LIVEDYN_VET_SECONDS", "120"))
#: Address space the child may add to what it inherits (bytes; a choice of ours, no source).
VET_MEMORY = int(os.environ.get("LIVEDYN_VET_MEMORY", str(2 << 30)))

_SIGNALS = {signal.SIGSEGV: "a read or write outside its memory (SIGSEGV)",
            signal.SIGBUS: "a bad memory access (SIGBUS)",
            signal.SIGABRT: "an abort (SIGABRT)", signal.SIGFPE: "an arithmetic fault (SIGFPE)",
            signal.SIGILL: "an illegal instruction (SIGILL)"}


class VetResult:
    """What the child found: ``report`` lines, and its ``seconds`` (wall time of the child)."""

    def __init__(self, report, seconds):
        self.report = tuple(report)
        self.seconds = seconds


def _vm_size() -> int:
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmSize:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


def _child(path, job, wfd, memory):
    """In the forked child: run ``job()``, write one JSON line, leave with os._exit."""
    code = 0
    try:
        import faulthandler

        # a crash of the user's code is the parent's one refusing line, not a traceback dump
        # of this child (faulthandler, when the parent had it on, would print one)
        faulthandler.disable()
        try:
            import resource

            if memory:
                cap = _vm_size() + memory
                resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
        except (ImportError, ValueError, OSError):
            pass
        from .algorithms.user import UserAlgorithmError

        try:
            msg = {"ok": True, "report": list(job() or ())}
        except UserAlgorithmError as e:
            msg = {"ok": False, "error": str(e), "detail": getattr(e, "detail", "")[:20000]}
        except MemoryError:
            msg = {"ok": False, "what": f"ran out of memory (more than {memory >> 20} MiB)"}
        except SystemExit as e:
            msg = {"ok": False, "what": f"called sys.exit({e.code!r})"}
        except KeyboardInterrupt:
            msg = {"ok": False, "what": "was interrupted"}
        except BaseException as e:  # anything else the user's code raised past the loader
            first = str(e).strip().splitlines()[0] if str(e).strip() else ""
            msg = {"ok": False, "what": f"raised {type(e).__name__}: {first[:200]}"}
        data = (json.dumps(msg) + "\n").encode()
        while data:
            data = data[os.write(wfd, data):]
    except BaseException:
        code = 70
    finally:
        os._exit(code)  # no atexit handlers: the parent's servers and files are not ours


def vet_import(path, source, digest, seconds=None, memory=None) -> VetResult:
    """Run the file's top level in a child; UserAlgorithmError if it hangs, crashes, exits,
    runs out of memory or raises."""
    from .algorithms import user

    return _in_child(path, "being loaded", lambda: user._import(path, source, digest) and (),
                     seconds, memory)


def vet_checks(alg, seconds=None, memory=None) -> VetResult:
    """Run the load-time checks of a compiled ``alg`` in a child; its report, or
    UserAlgorithmError."""
    from .checks import check_algorithm

    _preload(alg)
    return _in_child(alg.source, "being checked", lambda: check_algorithm(alg).report,
                     seconds, memory)


def _preload(alg):
    """Load the built-in kernel that runs ``alg``'s stages here, before forking, from numba's
    cache (compiling for the signature only, running nothing), so that neither the child nor
    each later child loads it again; this process needs it next anyway."""
    if alg.kind == "user":
        return  # a whole kernel is compiled already
    try:
        import numba
        import numpy as np

        from .processor import Processor

        proc = Processor(alg, 48000.0, 2, warm=False)
        kernel = proc._kernel
        if kernel.signatures:
            return
        x = np.zeros((1, 2), np.float32)
        args = (x, x, np.empty_like(x), proc.p, proc.st, proc.ring, proc._no_trace)
        from .dsp import announce, needs_compiling

        cold = needs_compiling(kernel)
        if cold and announce is not None:
            announce(f"compiling the {alg.kind} kernel (first run only; cached afterwards) ...")
        kernel.compile(tuple(numba.typeof(a) for a in args))
    except Exception:
        pass  # the child loads it then


def _in_child(path, doing, job, seconds, memory) -> VetResult:
    from .algorithms.user import UserAlgorithmError

    seconds = VET_SECONDS if seconds is None else float(seconds)
    memory = VET_MEMORY if memory is None else int(memory)
    t0 = time.monotonic()
    rfd, wfd = os.pipe()
    pid = os.fork()
    if pid == 0:  # pragma: no cover (the child's coverage is not collected)
        os.close(rfd)
        _child(path, job, wfd, memory)
    os.close(wfd)
    buf = b""
    status = None
    eof = False
    try:
        deadline = t0 + seconds
        while True:
            got, st = os.waitpid(pid, os.WNOHANG)
            if got:
                status = st
                if not eof:
                    buf += _drain(rfd)
                break
            left = deadline - time.monotonic()
            if left <= 0:
                os.kill(pid, signal.SIGKILL)
                os.waitpid(pid, 0)
                raise UserAlgorithmError(
                    f"{path}: refused: it did not finish within {seconds:g} s while {doing} "
                    "(an endless loop?); livedyn stopped it")
            if eof:
                time.sleep(min(left, 0.01))
                continue
            r, _, _ = select.select([rfd], [], [], min(left, 0.05))
            if r:
                chunk = os.read(rfd, 65536)
                if chunk:
                    buf += chunk
                else:
                    eof = True
    except BaseException:
        try:
            os.kill(pid, signal.SIGKILL)
            os.waitpid(pid, 0)
        except (ProcessLookupError, ChildProcessError):
            pass
        raise
    finally:
        os.close(rfd)
    took = time.monotonic() - t0
    lines = buf.decode(errors="replace").strip().splitlines()
    msg = None
    if lines:
        try:
            msg = json.loads(lines[-1])
        except ValueError:
            msg = None
    if msg is None:
        if os.WIFSIGNALED(status):
            sig = os.WTERMSIG(status)
            what = _SIGNALS.get(sig, f"signal {sig}")
            raise UserAlgorithmError(f"{path}: refused: it crashed while {doing}: {what}")
        code = os.WEXITSTATUS(status) if os.WIFEXITED(status) else status
        raise UserAlgorithmError(f"{path}: refused: it ended the process (exit code {code}) "
                                 f"while {doing}")
    if msg.get("ok"):
        return VetResult(msg.get("report", ()), took)
    if "error" in msg:
        raise UserAlgorithmError(msg["error"], msg.get("detail", ""))
    raise UserAlgorithmError(f"{path}: refused: it {msg['what']} while {doing}")


def _drain(fd) -> bytes:
    out = b""
    while True:
        r, _, _ = select.select([fd], [], [], 0)
        if not r:
            return out
        chunk = os.read(fd, 65536)
        if not chunk:
            return out
        out += chunk
