"""LiveSession: one live run from start to teardown, shared by ``run``, ``demo`` and the bench.

A session owns, in this order of starting (and the reverse of stopping): the headless JACK
server (when asked for), PortAudio's view of it, the :class:`~livedyn.engine.engine.Engine`
and its stream, the file watcher, and whoever shows the run (status lines or the console).

Teardown order, whatever ended the run (time up, input ended, the user, a signal, a failure):
the watcher stops; the statistics are taken; the engine fades out, stops and closes its
stream, closes the recordings (complete, under their final names) and writes the automation;
the statistics file is written; PortAudio is shut down *before* the server it talks to; the
server stops and its entry in JACK's table of servers and its /dev/shm objects are freed.

Signals: while a session is open, SIGINT, SIGTERM and SIGHUP end the run in that same orderly
way (the handler only records the signal; the run loop sees it within 50 ms).

Exit policy: after a failure of the stream (a dead server or device) PortAudio can neither be
stopped nor shut down: the session says so in one line on stderr, frees the server's table
entry and leaves the process with ``os._exit(3)`` (``exit_on_failure``), after the recordings
and the statistics were written.
"""
from __future__ import annotations

import glob
import json
import os
import signal
import sys
import time

from .engine import Engine

SIGNALS = tuple(getattr(signal, n) for n in ("SIGINT", "SIGTERM", "SIGHUP")
                if hasattr(signal, n))
EXIT_FAILURE = 3


def status_line(snap, t):
    """One line of a run's state: peaks, gain reduction, callback load, late/flagged blocks."""
    def peaks(v):
        return "/".join("-inf" if x <= -199 else f"{x:.1f}" for x in v) or "-"

    load = snap["callback_load"]
    return (f"{t:6.1f} s  in {peaks(snap['peak_in_dbfs'])}  out {peaks(snap['peak_out_dbfs'])} "
            f"dBFS  GR {snap['gain_reduction_db']:.1f} dB  load {100 * load['median']:.1f} % "
            f"(max {100 * load['max']:.0f} %)  late {snap['late_blocks']}  flagged "
            f"{snap['flagged_blocks']}")


class LiveSession:
    """Server, stream, engine, watcher and display of one live run, with its teardown.

    Parameters
    ----------
    processor : Processor
        What runs live.
    blocksize : int
        Frames per callback (and the headless server's period).
    headless : bool
        Start a JACK server with its dummy backend and run on it.
    realtime : bool
        Ask for real time: the headless server with ``-R``, the engine's stream from its host
        API, and locked memory (see ``engine/realtime.py``).
    capture, playback : int
        The headless server's port counts.
    watch : bool
        Reload the processor's algorithm file when it changes (a FileWatcher).
    handle_signals : bool
        Install the SIGINT/SIGTERM/SIGHUP handlers while the session is open (main thread
        only).
    exit_on_failure : bool
        After a stream failure, leave the process with ``os._exit(3)`` (see the module text).
    out : callable
        Where the session's lines go (``print``; ``None`` for silence).
    **engine_options
        Passed to :class:`Engine` (device, routing, sources, record_dir, monitor, ...).
    """

    def __init__(self, processor, blocksize=64, *, headless=False, realtime=True, capture=2,
                 playback=2, watch=False, handle_signals=True, exit_on_failure=True, out=print,
                 **engine_options):
        self.proc = processor
        self.blocksize = int(blocksize)
        self.headless = bool(headless)
        self.realtime = bool(realtime)
        self.capture, self.playback = int(capture), int(playback)
        self.watch_file = bool(watch)
        self.handle_signals = bool(handle_signals)
        self.exit_on_failure = bool(exit_on_failure)
        self.out = out or (lambda *a, **k: None)
        self.engine_options = engine_options
        self.server = None
        self.engine = None
        self.watcher = None
        self.signal_received = None
        self.failure = None
        self.stats_error = None  # one line when the statistics could not be written
        self.snapshot = None
        self.t_start = None
        self._old_handlers = {}
        self._closed = False

    # ---- signals ------------------------------------------------------------------------------
    def _on_signal(self, signum, frame):
        if self.signal_received is None:
            self.signal_received = signum

    def _install_signals(self):
        import threading

        if not self.handle_signals or threading.current_thread() is not threading.main_thread():
            return
        for s in SIGNALS:
            self._old_handlers[s] = signal.signal(s, self._on_signal)

    def _restore_signals(self):
        for s, h in self._old_handlers.items():
            signal.signal(s, h)
        self._old_handlers = {}

    # ---- start --------------------------------------------------------------------------------
    def open(self):
        """Start the server (headless), PortAudio, the engine and its stream, the watcher."""
        from . import stream as st

        self._install_signals()
        try:
            if self.headless:
                from .jackserver import JackServer

                self.server = JackServer(int(self.proc.samplerate), self.blocksize,
                                         capture=self.capture, playback=self.playback,
                                         realtime=self.realtime).start()
                st.reinitialise()
                if self.engine_options.get("device") is None:
                    self.engine_options["device"] = "system"
            self.engine = Engine(self.proc, self.blocksize, realtime=self.realtime,
                                 **self.engine_options)
            self.engine.start()
            self.t_start = time.monotonic()
            if self.watch_file:
                from .watch import FileWatcher

                self.watcher = FileWatcher(self.engine, self.proc.algorithm.source).start()
        except BaseException:
            self._abort_start()
            raise
        return self

    def _abort_start(self):
        from . import stream as st

        if self.engine is not None and self.engine.stream is not None:
            self.engine.stop()
        st.terminate()  # closes a stream left open, before its server goes
        self._stop_server()
        self._restore_signals()
        self._closed = True

    # ---- run ----------------------------------------------------------------------------------
    def _ended(self, seconds, t, until_source_ends):
        eng = self.engine
        if self.signal_received is not None:
            return "signal"
        if not eng.watch():
            self.failure = eng.error
            return "failure"
        if self.server is not None and not self.server.alive():
            self.failure = (f"the JACK server {self.server.name} stopped while the stream ran "
                            "(killed or crashed)")
            return "failure"
        if seconds is not None and t >= seconds:
            return "time"
        if until_source_ends and eng.source_finished:
            return "input"
        return None

    def run_status_lines(self, seconds=None, until_source_ends=False):
        """One status line a second (and the engine's notices) until the time is up, the input
        ends, a signal arrives or the stream fails. Returns why it ended."""
        t0 = time.monotonic()
        next_line = 1.0
        while True:
            time.sleep(0.05)
            t = time.monotonic() - t0
            why = self._ended(seconds, t, until_source_ends)
            if why is not None:
                break
            for level, text in self.engine.take_notices():
                self.out(f"{t:6.1f} s  {level}: {text}", flush=True)
            if t >= next_line:
                self.out(status_line(self.engine.snapshot(), t), flush=True)
                next_line += 1.0
        if why == "signal":
            self.out(f"stopping ({signal.Signals(self.signal_received).name})", flush=True)
        return why

    def run_console(self, run_console, seconds=None, until_source_ends=False, refresh_hz=20,
                    title=None, controls=None):
        """The full-screen console until the user quits (or the time is up, or a signal).

        ``run_console`` is :func:`livedyn.console.run_console`, handed in by the caller: the
        console sits above the engine, so the session does not import it."""

        def check():
            if self.server is not None and not self.server.alive():
                return f"the JACK server {self.server.name} stopped while the stream ran"
            if until_source_ends and self.engine.source_finished:
                return "the input has played to its end"
            return None

        def interrupt(signum, frame):  # the console's event loop ends on KeyboardInterrupt
            self._on_signal(signum, frame)
            raise KeyboardInterrupt

        for s in self._old_handlers:
            signal.signal(s, interrupt)
        try:
            run_console(self.engine, title=title or "livedyn run" +
                        (" (headless)" if self.server else ""), check=check,
                        quit_after=seconds, refresh_hz=refresh_hz, controls=controls)
        except KeyboardInterrupt:
            pass
        finally:
            for s in self._old_handlers:
                signal.signal(s, self._on_signal)
        if self.server is not None and not self.server.alive():
            self.failure = (f"the JACK server {self.server.name} stopped while the stream ran "
                            "(killed or crashed)")
        elif self.engine.error:
            self.failure = self.engine.error
        return "failure" if self.failure else ("signal" if self.signal_received else "user")

    # ---- teardown -----------------------------------------------------------------------------
    def close(self, stats_json=None):
        """Stop everything in order (see the module text); returns the run's statistics.

        On a failure with ``exit_on_failure``, does not return: ``os._exit(3)``."""
        from . import stream as st

        if self._closed:
            return self.snapshot
        self._closed = True
        eng = self.engine
        if self.watcher is not None:
            self.watcher.stop()
        snap = eng.snapshot()
        if self.watcher is not None:
            snap["watch"] = {"versions_swapped": self.watcher.versions,
                             "failed_loads": self.watcher.failures, "swaps": eng.swap_log}
        if self.signal_received is not None:
            snap["stopped_by"] = signal.Signals(self.signal_received).name
        if self.failure:
            eng.error = self.failure
        dead = self.server is not None and not self.server.alive()
        eng.stop(stream_timeout=0.05 if dead else None)  # a dead server's stop never returns
        # what the callback's thread was granted; the headless server's own flag beside it
        snap["realtime_granted"] = bool((snap.get("realtime") or {}).get("granted"))
        snap["server_realtime"] = bool(self.server.realtime_granted) if self.server else None
        self.snapshot = snap
        if eng.record_error:
            snap["record_error"] = eng.record_error
        if stats_json:
            from ..files import write_text_atomic

            try:
                write_text_atomic(stats_json, json.dumps(snap, indent=2, default=float) + "\n")
            except OSError as e:  # disk full, say: the take and the server still get closed
                self.stats_error = f"--stats-json {stats_json}: cannot write: {e.strerror or e}"
        if self.failure:
            if self.exit_on_failure:
                print(f"livedyn: error: {self.failure}", file=sys.stderr, flush=True)
                if self.server is not None:
                    self.server.reclaim()
                sys.stdout.flush()
                os._exit(EXIT_FAILURE)  # PortAudio cannot be shut down once its server is gone
            self._restore_signals()
            return snap
        st.terminate()
        self._stop_server()
        self._restore_signals()
        return snap

    def _stop_server(self):
        srv = self.server
        if srv is None:
            return
        srv.stop()
        # a server that did not give back its table entry or shared memory: free them
        if glob.glob(f"/dev/shm/jack_{srv.name}_*") or \
                glob.glob(f"/dev/shm/jack_sem.*_{srv.name}_*"):
            srv.reclaim()

    def __enter__(self):
        return self.open()

    def __exit__(self, *exc):
        if not self._closed:
            if exc[0] is not None and self.engine is None:
                return False
            self.close()
        return False
