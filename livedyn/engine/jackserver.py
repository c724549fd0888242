"""A headless JACK server (dummy backend) that gives a clock-paced device with no soundcard.

Each server gets a name of its own; ``JACK_NO_START_SERVER=1`` keeps any client from starting a
default server behind our back. The server runs in its own process group and is stopped on
every exit path (context manager, ``atexit``, SIGTERM/SIGINT/SIGHUP while it runs).
"""
from __future__ import annotations

import atexit
import os
import shutil
import signal
import subprocess
import time
import uuid
import weakref

_LIVE = weakref.WeakSet()


class JackError(RuntimeError):
    """The server could not be started or died; one line for the user."""


def _die_with_parent():
    """In the child: the kernel sends SIGTERM when the thread that forked it exits (so even a
    kill -9 of livedyn stops the server). Start servers from the main thread."""
    try:
        import ctypes

        ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, signal.SIGTERM)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass


def _stop_all():
    for srv in list(_LIVE):
        srv.stop()


atexit.register(_stop_all)


class JackServer:
    """``jackd -n NAME -R -d dummy -r RATE -p PERIOD -w WAIT -C IN -P OUT``.

    Parameters
    ----------
    samplerate, period : int
        Rate and block size (frames per period).
    capture, playback : int
        Number of dummy capture (input) and playback (output) ports.
    sync : bool
        Synchronous mode (``-S``): the server waits for its clients each cycle.
    realtime : bool
        Ask for real-time scheduling (``-R``, the default); when the system refuses, start with
        ``--no-realtime`` and say why in :attr:`realtime_note`.
    """

    def __init__(self, samplerate=48000, period=64, capture=2, playback=2, sync=True,
                 realtime=True, name=None):
        if shutil.which("jackd") is None:
            raise JackError("jackd not found: install the jackd2 package "
                            "(apt-get install --no-install-recommends jackd2)")
        self.samplerate = int(samplerate)
        self.period = int(period)
        self.capture = int(capture)
        self.playback = int(playback)
        self.sync = bool(sync)
        self.realtime = bool(realtime)
        self.name = name or f"livedyn-{os.getpid()}-{uuid.uuid4().hex[:6]}"
        self.proc = None
        self.realtime_granted = False
        self.realtime_note = "" if realtime else "real time not asked (--no-realtime)"
        self._log = None

    # -- environment for clients ---------------------------------------------------------------
    def client_env(self):
        """Environment variables that make JACK clients (PortAudio) talk to this server only."""
        return {"JACK_DEFAULT_SERVER": self.name, "JACK_NO_START_SERVER": "1"}

    def apply_env(self):
        os.environ.update(self.client_env())

    def _cmd(self, realtime):
        wait_us = max(1, int(round(1e6 * self.period / self.samplerate)))
        cmd = ["jackd", "-n", self.name]
        cmd += ["-R"] if realtime else ["--no-realtime"]
        if self.sync:
            cmd.append("-S")
        cmd += ["-d", "dummy", "-r", str(self.samplerate), "-p", str(self.period),
                "-w", str(wait_us), "-C", str(self.capture), "-P", str(self.playback)]
        return cmd

    # -- life cycle ----------------------------------------------------------------------------
    def start(self, timeout=10.0):
        self.apply_env()
        refused = ""
        for realtime in ([True, False] if self.realtime else [False]):
            self._spawn(realtime)
            ready = self._wait_ready(timeout)
            if ready and realtime and self._refused_line():
                # jackd -R keeps running without real time when the system refuses it (and its
                # clients then fail to get it too): start again, plainly, and say so
                ready = False
            if ready:
                self.realtime_granted = realtime
                if self.realtime and not realtime:
                    self.realtime_note = (
                        f"the JACK server runs without real time: jackd -R was refused "
                        f"({refused}); allow real-time priority (rtprio) for your user, "
                        "see 'livedyn ready'")
                _LIVE.add(self)
                return self
            refused = self._refused_line() or self.last_output(limit=120)
            self.stop()
        raise JackError(f"the JACK server {self.name} did not start: {self.last_output()}")

    def _spawn(self, realtime):
        import tempfile

        self._log = tempfile.TemporaryFile(mode="w+b")
        env = dict(os.environ)
        env.update(self.client_env())
        self.proc = subprocess.Popen(self._cmd(realtime), stdout=self._log,
                                     stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, env=env,
                                     start_new_session=True, preexec_fn=_die_with_parent)

    def _wait_ready(self, timeout):
        env = dict(os.environ)
        env.update(self.client_env())
        t_end = time.monotonic() + timeout
        while time.monotonic() < t_end:
            if self.proc.poll() is not None:
                return False
            try:
                r = subprocess.run(["jack_lsp"], env=env, capture_output=True, timeout=3)
                if r.returncode == 0 and b"system:" in r.stdout:
                    return True
            except subprocess.TimeoutExpired:
                pass
            time.sleep(0.05)
        return False

    def _refused_line(self):
        """jackd's own line saying that real-time scheduling was refused, or ''."""
        if self._log is None:
            return ""
        try:
            self._log.seek(0)
            text = self._log.read().decode(errors="replace")
        except (OSError, ValueError):
            return ""
        for line in text.splitlines():
            if "Cannot use real-time scheduling" in line:
                return line.strip()
        return ""

    def alive(self):
        return self.proc is not None and self.proc.poll() is None

    def last_output(self, limit=300):
        if self._log is None:
            return "(no output)"
        try:
            self._log.seek(0)
            text = self._log.read().decode(errors="replace").strip().splitlines()
        except (OSError, ValueError):
            return "(no output)"
        lines = [t for t in text if t.strip() and "Copyright" not in t and "WARRANTY" not in t
                 and "free software" not in t and "under certain" not in t]
        return (" / ".join(lines[-3:]) or "(no output)")[:limit]

    def connect(self, src, dst):
        """Patch two ports (``jack_connect``)."""
        env = dict(os.environ)
        env.update(self.client_env())
        r = subprocess.run(["jack_connect", src, dst], env=env, capture_output=True, timeout=5)
        if r.returncode != 0:
            raise JackError(f"jack_connect {src} {dst} failed: "
                            f"{(r.stderr or r.stdout).decode(errors='replace').strip()}")

    def disconnect(self, src, dst):
        env = dict(os.environ)
        env.update(self.client_env())
        subprocess.run(["jack_disconnect", src, dst], env=env, capture_output=True, timeout=5)

    def connections(self):
        """{port: [connected ports]} from ``jack_lsp -c``."""
        env = dict(os.environ)
        env.update(self.client_env())
        r = subprocess.run(["jack_lsp", "-c"], env=env, capture_output=True, timeout=5)
        out, cur = {}, None
        for line in r.stdout.decode(errors="replace").splitlines():
            if not line.strip():
                continue
            if line.startswith((" ", "\t")):
                out.setdefault(cur, []).append(line.strip())
            else:
                cur = line.strip()
                out.setdefault(cur, [])
        return out

    def loopback(self, client="PortAudio"):
        """Patch the client's outputs to its own inputs (out_i -> in_i), unpatching the dummy
        capture ports, so that a stream hears what it plays: for latency measurement."""
        con = self.connections()

        def num(port):
            return int(port.rsplit("_", 1)[1])

        ins = sorted((p for p in con if p.startswith(client + ":in_")), key=num)
        outs = sorted((p for p in con if p.startswith(client + ":out_")), key=num)
        for src_list, dst in ((con[p], p) for p in ins):
            for src in src_list:
                self.disconnect(src, dst)
        for o, i in zip(outs, ins):
            self.connect(o, i)
        return list(zip(outs, ins))

    def ports(self):
        env = dict(os.environ)
        env.update(self.client_env())
        r = subprocess.run(["jack_lsp"], env=env, capture_output=True, timeout=5)
        return r.stdout.decode(errors="replace").split()

    def kill(self):
        """Kill the server at once (tests use this to simulate a dying server).

        A server killed this way keeps its entry in JACK's small table of servers until a
        server of the same name starts again: call :meth:`reclaim` afterwards.
        """
        if self.alive():
            os.killpg(self.proc.pid, signal.SIGKILL)
            self.proc.wait(timeout=5)

    def reclaim(self):
        """After a kill: free the dead server's table entry and /dev/shm files."""
        self.stop()
        try:
            self.start(timeout=5.0)
        except JackError:
            pass
        self.stop()
        import glob

        for pat in (f"/dev/shm/jack_{self.name}_*", f"/dev/shm/jack_sem.*_{self.name}_*"):
            for f in glob.glob(pat):
                try:
                    os.unlink(f)
                except OSError:
                    pass

    def stop(self, timeout=3.0):
        proc, self.proc = self.proc, None
        _LIVE.discard(self)
        if proc is None:
            return
        if proc.poll() is None:
            try:
                os.killpg(proc.pid, signal.SIGTERM)
                proc.wait(timeout=timeout)
            except (ProcessLookupError, subprocess.TimeoutExpired):
                try:
                    os.killpg(proc.pid, signal.SIGKILL)
                    proc.wait(timeout=timeout)
                except (ProcessLookupError, subprocess.TimeoutExpired):
                    pass

    def __enter__(self):
        return self.start()

    def __exit__(self, *exc):
        self.stop()
