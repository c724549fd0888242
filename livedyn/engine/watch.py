"""Reload a user algorithm file when it changes, and swap it into a running Engine.

The watcher thread polls the file's modification time and size (every ``interval`` seconds);
when they change it waits until the text has stayed the same for one more poll (editors write
in steps), then compiles and checks the new version in this thread, off the audio thread, and
calls :meth:`Engine.swap`. A version that fails leaves the running one alone; either way the
outcome is posted with :meth:`Engine.notice` as one line.
"""
from __future__ import annotations

import hashlib
import threading
import time
from pathlib import Path


class FileWatcher:
    def __init__(self, engine, path, interval=0.1):
        self.engine = engine
        self.path = Path(path).resolve()
        self.interval = float(interval)
        self.versions = 0  # versions swapped in
        self.failures = 0
        self.last_error = None
        self._stop = threading.Event()
        self._thread = None
        self._seen = self._stamp()
        self._digest = self._hash()

    def _stamp(self):
        try:
            st = self.path.stat()
            return (st.st_mtime_ns, st.st_size)
        except OSError:
            return None

    def _hash(self):
        try:
            return hashlib.sha256(self.path.read_bytes()).hexdigest()
        except OSError:
            return None

    def start(self):
        self._thread = threading.Thread(target=self._loop, name="livedyn-watch", daemon=True)
        self._thread.start()
        return self

    def stop(self):
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=10)

    def _loop(self):
        while not self._stop.wait(self.interval):
            stamp = self._stamp()
            if stamp == self._seen:
                continue
            # settle: the same text on two reads one poll apart
            first = self._hash()
            if self._stop.wait(self.interval):
                return
            if self._hash() != first:
                continue  # still being written; look again next poll
            self._seen = self._stamp()
            if first is None:
                self.engine.notice("warn", f"{self.path}: gone; still running the last version")
                continue
            if first == self._digest:
                continue
            self._digest = first
            self.reload()

    def reload(self):
        """Load, check and swap in the file now (from the calling thread)."""
        from ..loader import UserAlgorithmError, load
        from ..params import ParamError
        from .engine import EngineError

        t0 = time.monotonic()
        try:
            alg = load(self.path, precision=getattr(getattr(self.engine, "proc", None),
                                                    "precision", "float64"))
            info = self.engine.swap(alg)
        except (UserAlgorithmError, ParamError, EngineError) as e:
            self.failures += 1
            self.last_error = str(e).splitlines()[0]
            self.engine.notice("error", f"{self.last_error} -- still running the previous "
                                        "version")
            return False
        self.versions += 1
        self.last_error = None
        self.engine.notice("info", f"{self.path.name}: version {self.versions + 1} running "
                                   f"(loaded, checked and swapped in "
                                   f"{time.monotonic() - t0:.1f} s; crossfade "
                                   f"{info['swap_blocks']} blocks)")
        return True
