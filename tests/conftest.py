"""Shared fixtures.

``jack_server``: a headless JACK server (dummy backend) of the test's own, started before the
test with PortAudio re-initialised so that it sees the server; on teardown PortAudio is
terminated first (closing any stream still open) and then the server is stopped. No ``jackd``
is left behind, even when the test fails: the server runs in its own process group, is killed
if it does not stop, and a slot it leaves in JACK's table of servers is reclaimed.

Options come from a ``jack`` marker::

    @pytest.mark.jack(capture=4, playback=4, realtime=False)
    def test_x(jack_server): ...
"""
from __future__ import annotations

import os
import signal
import struct
import subprocess

import pytest

# Before anything imports sounddevice (PortAudio scans host APIs at import): no JACK client of
# this process may start a default server behind our back.
os.environ["JACK_NO_START_SERVER"] = "1"

JACK_DEFAULTS = dict(samplerate=48000, period=64, capture=2, playback=2, realtime=True)

# Names of servers that died while PortAudio had a client on them: PortAudio can then be neither
# terminated nor re-initialised in this process (Pa_Terminate hangs), so later jack_server
# users fail at once instead of hanging.
_PORTAUDIO_STUCK: list = []


def pytest_configure(config):
    config.addinivalue_line(
        "markers", "jack(**options): options of the jack_server fixture (samplerate, period, "
                   "capture, playback, sync, realtime)")


def jack_registry():
    """(pid, server name) of every entry in JACK's table of servers (8 slots).

    The table is the head of /dev/shm/jack-shm-registry: a 24-byte header, then 8 entries of a
    32-bit pid and a 257-byte name, padded to 264 bytes (JACK2 shm.h; layout recalled from
    memory and checked against this machine's file: the header's own length field reads 2136 =
    24 + 8 * 264). Names are stored as ``jack-UID:NAME:``.
    """
    try:
        with open("/dev/shm/jack-shm-registry", "rb") as f:
            b = f.read(2136)
    except OSError:
        return []
    if len(b) < 2136 or b[:4] != b"KCAJ":
        return []
    out = []
    for i in range(8):
        off = 24 + 264 * i
        pid = struct.unpack_from("<i", b, off)[0]
        name = b[off + 4:off + 261].split(b"\0")[0].decode(errors="replace")
        if pid:
            out.append((pid, name.split(":", 1)[1].rstrip(":") if ":" in name else name))
    return out


def jackd_pids(name):
    """Pids of jackd processes serving ``name`` (our names are unique per server)."""
    r = subprocess.run(["pgrep", "-f", f"jackd -n {name} "], capture_output=True, text=True)
    return [int(p) for p in r.stdout.split()]


def make_sure_gone(server):
    """Kill what is left of ``server`` (by pid) and free its slot in JACK's table."""
    from livedyn.engine.jackserver import JackServer

    for pid in jackd_pids(server.name):
        try:
            os.kill(pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
    if any(n == server.name for _, n in jack_registry()):
        JackServer(server.samplerate, server.period, name=server.name).reclaim()


def reclaim_dead_slots():
    """Free the slots of servers that died without giving theirs back (a kill -9 leaves one
    until a server of the same name starts again); returns their names."""
    from livedyn.engine.jackserver import JackServer

    names = [n for pid, n in jack_registry() if not os.path.exists(f"/proc/{pid}")]
    for n in names:
        JackServer(name=n).reclaim()
    return names


def terminate_portaudio():
    from livedyn.engine import stream

    sd = stream._sd()
    while sd._initialized > 0:
        sd._terminate()


@pytest.fixture(autouse=True)
def _user_folders(tmp_path_factory, monkeypatch):
    """Every test gets empty user folders of its own (presets, configuration), never the
    home folder of whoever runs the tests."""
    home = tmp_path_factory.mktemp("user")
    monkeypatch.setenv("LIVEDYN_USER_PRESETS", str(home / "presets"))
    monkeypatch.setenv("XDG_CONFIG_HOME", str(home / "config"))
    monkeypatch.setenv("XDG_DATA_HOME", str(home / "data"))


@pytest.fixture
def jack_server(request):
    """A started JackServer (realtime asked for by default) with PortAudio re-initialised."""
    from livedyn.engine import stream
    from livedyn.engine.jackserver import JackError, JackServer

    if _PORTAUDIO_STUCK:
        pytest.fail(f"PortAudio is unusable in this process: the JACK server "
                    f"{_PORTAUDIO_STUCK[0]} died under it in an earlier test")
    opts = dict(JACK_DEFAULTS)
    marker = request.node.get_closest_marker("jack")
    if marker is not None:
        opts.update(marker.kwargs)
    server = JackServer(**opts)
    died = False
    attached = False  # PortAudio has a client on this server
    try:
        try:
            server.start()
        except JackError as e:
            if "Too many servers" not in str(e) or not reclaim_dead_slots():
                raise
            server.start()  # dead servers held every slot of JACK's table: try once more
        attached = True
        stream.reinitialise()
        yield server
    finally:
        try:
            if server.alive() or not attached:
                terminate_portaudio()
            else:
                died = True
                _PORTAUDIO_STUCK.append(server.name)
        finally:
            server.stop()
            make_sure_gone(server)
    if died:
        pytest.fail(f"the JACK server {server.name} died during the test")
