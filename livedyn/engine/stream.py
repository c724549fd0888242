"""PortAudio devices and a duplex stream whose callback is native code.

sounddevice provides PortAudio's cffi handle; the stream is opened with ``Pa_OpenStream``
directly so that the callback can be a numba ``@cfunc`` address (sounddevice's own streams call a
Python function, which needs the interpreter lock).
"""
from __future__ import annotations

import threading

# Streams whose stop did not return (their server or device died): they and every array their
# callback may touch stay alive for the rest of the process, which should leave with os._exit
# (PortAudio cannot be terminated once a JACK server is gone under it).
_ABANDONED = []


def abandoned():
    """Streams that could not be stopped, kept alive with their arrays (see ``shutdown``)."""
    return list(_ABANDONED)


class DeviceError(ValueError):
    """A device, rate or channel request that cannot be met; one line for the user."""


def _sd():
    try:
        import sounddevice as sd
    except OSError as e:  # PortAudio library missing
        raise DeviceError(f"PortAudio not available ({e}); install libportaudio2, or use "
                          "--headless") from None
    return sd


def terminate():
    """Shut PortAudio down (before stopping a JACK server it talks to); idempotent."""
    sd = _sd()
    try:
        sd._terminate()
    except sd.PortAudioError:
        pass


def reinitialise():
    """Make PortAudio rescan host APIs (after a JACK server started, say)."""
    terminate()
    _sd()._initialize()


def list_devices():
    """Every device as a dict: index, name, host API, channels, default rate."""
    sd = _sd()
    apis = sd.query_hostapis()
    out = []
    for i, d in enumerate(sd.query_devices()):
        out.append({"index": i, "name": d["name"], "hostapi": apis[d["hostapi"]]["name"],
                    "inputs": d["max_input_channels"], "outputs": d["max_output_channels"],
                    "samplerate": d["default_samplerate"]})
    return out


def find_device(spec, kind):
    """A device index from an index, a name or part of one; ``None``: the default."""
    sd = _sd()
    devs = list_devices()
    if not devs:
        raise DeviceError("no audio devices found: check PortAudio and the sound system, or "
                          "use --headless")
    if spec is None:
        idx = sd.default.device[0 if kind == "input" else 1]
        if idx is None or idx < 0:
            cand = [d for d in devs if d["inputs" if kind == "input" else "outputs"] > 0]
            if not cand:
                raise DeviceError(f"no {kind} device found; choose one with --device")
            idx = cand[0]["index"]
        return int(idx)
    s = str(spec).strip()
    if s.isdigit():
        i = int(s)
        if not 0 <= i < len(devs):
            raise DeviceError(f"device {s}: no such device, expected 0 to {len(devs) - 1} "
                              "(see livedyn devices)")
        return i
    hits = [d for d in devs if s.lower() in d["name"].lower()]
    if not hits:
        names = ", ".join(repr(d["name"]) for d in devs)
        raise DeviceError(f"device {s!r}: not found, expected one of {names}")
    return hits[0]["index"]


class NativeStream:
    """A PortAudio duplex stream driven by a native callback address.

    ``keep`` is whatever holds the memory the callback touches (the user-data block and every
    array it points to): the stream owns it until the stream is closed, so that no array can be
    freed while a callback may run, whoever drops their references first.
    """

    def __init__(self, callback_address, user_address, in_device, out_device, in_channels,
                 out_channels, samplerate, blocksize, realtime=True, keep=None):
        self.keep = keep
        self.ptr = None
        self.state = "open"  # open, started, closed or abandoned
        sd = _sd()
        self._sd = sd
        ffi, lib = sd._ffi, sd._lib
        self._ffi, self._lib = ffi, lib
        devs = list_devices()
        din, dout = devs[in_device], devs[out_device]
        if in_channels > din["inputs"]:
            raise DeviceError(f"device {din['name']!r} has {din['inputs']} input channels, "
                              f"{in_channels} requested")
        if out_channels > dout["outputs"]:
            raise DeviceError(f"device {dout['name']!r} has {dout['outputs']} output channels, "
                              f"{out_channels} requested")
        qi = sd.query_devices(in_device)
        qo = sd.query_devices(out_device)
        from . import realtime as rt

        api = lib.Pa_GetHostApiInfo(qo["hostapi"])
        self.host_api = din["hostapi"] if din["hostapi"] == dout["hostapi"] else \
            f"{din['hostapi']} / {dout['hostapi']}"
        self.host_api_type = int(api.type) if api != ffi.NULL else -1
        self._rt_in = rt.host_stream_info(ffi, lib, self.host_api_type, realtime)
        self._rt_out = rt.host_stream_info(ffi, lib, self.host_api_type, realtime)
        pin = ffi.NULL
        if in_channels > 0:
            self._in = ffi.new("PaStreamParameters*", (
                in_device, in_channels, lib.paFloat32, qi["default_low_input_latency"],
                self._rt_in))
            pin = self._in
        self._out = ffi.new("PaStreamParameters*", (
            out_device, out_channels, lib.paFloat32, qo["default_low_output_latency"],
            self._rt_out))
        err = lib.Pa_IsFormatSupported(pin, self._out, float(samplerate))
        if err != 0:
            raise DeviceError(f"samplerate {samplerate:g} Hz with {in_channels} in / "
                              f"{out_channels} out on {din['name']!r}: {self._text(err)} "
                              f"(the device's default rate is {din['samplerate']:g} Hz)")
        self._cb = ffi.cast("PaStreamCallback *", callback_address)
        self._user = ffi.cast("void *", user_address)
        pp = ffi.new("PaStream**")
        err = lib.Pa_OpenStream(pp, pin, self._out, float(samplerate), int(blocksize), 0,
                                self._cb, self._user)
        if err < 0:
            raise DeviceError(f"cannot open {din['name']!r} at {samplerate:g} Hz, block "
                              f"{blocksize}: {self._text(err)}")
        self.ptr = pp[0]
        # before the stream starts: the host creates its callback thread at start
        self.host_realtime = rt.enable_host_realtime(sd, self.ptr, self.host_api_type, realtime)
        info = lib.Pa_GetStreamInfo(self.ptr)
        self.input_latency = float(info.inputLatency)
        self.output_latency = float(info.outputLatency)
        self.samplerate = float(info.sampleRate)
        self.device_names = (din["name"], dout["name"])

    def _text(self, err):
        return self._ffi.string(self._lib.Pa_GetErrorText(err)).decode(errors="replace")

    def start(self):
        err = self._lib.Pa_StartStream(self.ptr)
        if err < 0:
            raise DeviceError(f"cannot start the stream: {self._text(err)}")
        self.state = "started"

    def active(self):
        return self.ptr is not None and self._lib.Pa_IsStreamActive(self.ptr) == 1

    def stop(self):
        if self.ptr is not None:
            self._lib.Pa_StopStream(self.ptr)

    def close(self):
        if self.ptr is not None:
            self._lib.Pa_CloseStream(self.ptr)
            self.ptr = None
            self.state = "closed"
            self.keep = None

    def shutdown(self, timeout=3.0):
        """Stop and close the stream; only then let go of the callback's memory.

        After its server or device died, PortAudio's stop and close calls may never return:
        they run in a helper thread, and when they have not returned within ``timeout`` the
        stream is *abandoned* (kept, with its memory, for the life of the process; see
        :func:`abandoned`). Returns True when the stream was closed. Idempotent."""
        if self.state in ("closed", "abandoned"):
            return self.state == "closed"
        if self.ptr is None:
            self.state, self.keep = "closed", None
            return True
        done = threading.Event()

        def work():
            self._lib.Pa_StopStream(self.ptr)
            self._lib.Pa_CloseStream(self.ptr)
            done.set()

        t = threading.Thread(target=work, name="livedyn-stream-stop", daemon=True)
        t.start()
        if done.wait(timeout):
            t.join()
            self.ptr = None
            self.state, self.keep = "closed", None
            return True
        self.state = "abandoned"
        _ABANDONED.append(self)
        return False
