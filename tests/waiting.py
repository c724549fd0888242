"""Waiting in tests: on a condition with a generous timeout, never a fixed sleep.

A fixed sleep either wastes time on a fast machine or is too short on a loaded one
(DEVELOPERS.md, "Conventions the tests rely on"). :func:`wait_for` polls a condition;
:func:`stream_for` and :func:`stream_until` wait on the live stream's own frame counter, so
"half a second of audio" means half a second of the stream's audio however slowly the machine
delivers it.
"""
from __future__ import annotations

import time

#: Seconds a wait may take before the test fails: generous, for a machine shared with others.
TIMEOUT = 60.0


def wait_for(cond, timeout=TIMEOUT, every=0.005) -> bool:
    """Poll ``cond()`` until it is true (True) or ``timeout`` seconds pass (False)."""
    t_end = time.monotonic() + timeout
    while True:
        if cond():
            return True
        if time.monotonic() >= t_end:
            return False
        time.sleep(every)


def _frames(eng):
    from livedyn.engine import callback as cb

    return int(eng.stats[cb.S_FRAMES])


def stream_until(eng, seconds, timeout=TIMEOUT):
    """Wait until the engine's stream has played ``seconds`` of audio since it started."""
    target = int(round(seconds * eng.fs))
    assert wait_for(lambda: _frames(eng) >= target or not eng.watch(), timeout), \
        f"the stream played {_frames(eng)} of {target} frames in {timeout:g} s"
    assert eng.alive(), eng.error


def stream_for(eng, seconds, timeout=TIMEOUT):
    """Wait until the engine's stream has played ``seconds`` more of audio."""
    target = _frames(eng) + int(round(seconds * eng.fs))
    assert wait_for(lambda: _frames(eng) >= target or not eng.watch(), timeout), \
        f"the stream played {_frames(eng)} of {target} frames in {timeout:g} s"
    assert eng.alive(), eng.error
