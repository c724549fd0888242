"""What the console reads from the running engine ten or more times a second: the meter
snapshot, the gain-reduction history of the strip, the operating point on the curve (with its
fall ballistics), the engine's notices, the late and flagged block counters (with a reset
that keeps a baseline, and one hint when late blocks climb). Owns the :class:`Metering` part
of the console model; nothing else lives here."""
from __future__ import annotations

from collections import deque

from ..params import LAW_DUCKER
from .messages import Status, one_line

#: Seconds of gain-reduction history kept for the strip.
GR_HISTORY_SECONDS = 6.0
#: Fall rate of the displayed operating point, dB/s (like the level meter's bar; common
#: practice, no source).
POINT_FALL_DB_PER_S = 20.0
FLOOR_DB = -200.0
#: Late blocks within LATE_WINDOW_S seconds that bring the one hint line (common practice, no
#: source: one late block is a click, several in a few seconds are a pattern).
LATE_HINT_BLOCKS = 5
LATE_WINDOW_S = 10.0
LATE_HINT = ("late blocks are climbing ({n} in {s:g} s): try a larger block size "
             "(--blocksize 128 or 256) and check the machine with 'livedyn ready'")


class Metering:
    """Meter part of :class:`~livedyn.console.model.ConsoleModel` (a mixin)."""

    def _init_metering(self):
        self.snap = {}
        self.gr_history = deque()
        self._point = {"x": None, "y": None, "key": None, "t": None}
        self._reported_error = None
        self.counter_base = {"late_blocks": 0, "flagged_blocks": 0}
        self._late_seen = deque()  # (time, late count) over the last LATE_WINDOW_S
        self.late_hinted = False

    def count(self, name) -> int:
        """A block counter of the snapshot since the last :meth:`reset_counters`."""
        return max(0, int(self.snap.get(name, 0) or 0) - self.counter_base.get(name, 0))

    def reset_counters(self):
        """Count late and flagged blocks from 0 again (the engine's own totals stay)."""
        for k in self.counter_base:
            self.counter_base[k] = int(self.snap.get(k, 0) or 0)
        self._late_seen.clear()
        self.late_hinted = False
        self.info("late and flagged block counters reset to 0")

    def _watch_late(self, now, snap):
        late = int(snap.get("late_blocks", 0) or 0)
        seen = self._late_seen
        seen.append((now, late))
        while seen and seen[0][0] < now - LATE_WINDOW_S:
            seen.popleft()
        climbed = late - seen[0][1]
        if climbed >= LATE_HINT_BLOCKS and not self.late_hinted:
            self.late_hinted = True
            self.warn(LATE_HINT.format(n=climbed, s=LATE_WINDOW_S))

    def _after_tick(self, now):
        """Hook for the model (pending confirmations, remote changes)."""

    def _safe_snapshot(self):
        try:
            return self.engine.snapshot()
        except Exception as e:
            self.status = Status(f"meters: {one_line(e)}", "error")
            return None

    def tick(self):
        """Read the engine's meters once (call at >= 20 Hz); never raises."""
        try:
            self._tick()
        except Exception as e:
            self.fail(e)

    def _tick(self):
        now = float(self.clock())
        snap = self._safe_snapshot()
        if snap is None:
            return
        self.snap = snap
        self.bypassed = bool(snap.get("bypassed", self.bypassed))
        self.muted = bool(snap.get("muted", self.muted))
        gr = float(snap.get("gain_reduction_db", 0.0) or 0.0)
        self.gr_history.append((now, gr))
        while self.gr_history and self.gr_history[0][0] < now - GR_HISTORY_SECONDS:
            self.gr_history.popleft()
        self._update_point(now, snap, gr)
        err = None
        watch = getattr(self.engine, "watch", None)
        if callable(watch):
            watch()
        take = getattr(self.engine, "take_notices", None)
        if callable(take):
            for level, text in take():
                self.status = Status(one_line(text), level if level in ("info", "warn")
                                     else "error")
        if getattr(self.engine, "proc", self.proc) is not self.proc:
            self._rebind()
        e = getattr(self.engine, "error", None)
        if e:
            err = f"stream stopped: {e}"
        if err is None and self.check is not None:
            c = self.check()
            if c:
                err = str(c)
        if err and err != self._reported_error:
            self._reported_error = err
            self.status = Status(one_line(err) + " (quit with q)", "error")
        self._watch_late(now, snap)
        self._after_tick(now)

    def _update_point(self, now, snap, gr):
        def top(values):
            vals = [float(v) for v in (values or []) if v is not None]
            return max(vals) if vals else None

        key = top(snap.get("peak_key_dbfs"))
        main = top(snap.get("peak_in_dbfs"))
        out = top(snap.get("peak_out_dbfs"))
        p = self._point
        dt = 0.0 if p["t"] is None else max(0.0, now - p["t"])
        fall = POINT_FALL_DB_PER_S * dt

        def ballistic(old, new):  # instant rise, fall at POINT_FALL_DB_PER_S
            if new is None:
                return old
            if old is None:
                return new
            return max(new, old - fall)

        p["key"] = ballistic(p["key"], key)
        ducker = self.algorithm.law == LAW_DUCKER and self.algorithm.kind != "limiter"
        if ducker or self.key_driven:
            x = p["key"]
            from ..analysis import DUCKER_MAIN_DB

            if x is not None:
                base = DUCKER_MAIN_DB if ducker else x
                mk = self.live_value("makeup") if "makeup" in self.schema else 0.0
                p["x"], p["y"] = x, base - gr + mk
        else:
            p["x"] = ballistic(p["x"], main)
            p["y"] = ballistic(p["y"], out)
        p["t"] = now

    def gr_strip(self, columns: int, seconds: float = 5.0):
        """Largest gain reduction per column over the last ``seconds`` (oldest first), dB;
        None before the first reading."""
        columns = max(1, int(columns))
        now = self.gr_history[-1][0] if self.gr_history else float(self.clock())
        start = now - seconds
        out = [None] * columns
        for t, g in self.gr_history:
            if t < start:
                continue
            i = min(columns - 1, int((t - start) / seconds * columns))
            out[i] = g if out[i] is None else max(out[i], g)
        # a column no reading fell in (a late redraw) takes its left neighbour's value
        seen = [i for i, v in enumerate(out) if v is not None]
        if seen:
            for i in range(seen[0] + 1, seen[-1]):
                if out[i] is None:
                    out[i] = out[i - 1]
        return out
