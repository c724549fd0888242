"""The five built-in algorithms: compressor, limiter, expander, gate, ducker."""
from __future__ import annotations

from dataclasses import dataclass

from ..params import LAW_COMPRESSOR, LAW_DUCKER, LAW_EXPANDER, LAW_GATE, ParamError, Schema


class AlgorithmError(ParamError):
    """An algorithm name or file that cannot be used."""


@dataclass(frozen=True)
class Algorithm:
    name: str
    description: str
    schema: Schema
    kind: str  # which kernel runs it: "dynamics", "limiter", or "user" (a file's whole kernel)
    law: int  # gain law for the dynamics kernel (see livedyn.dsp.gaincurve)
    needs_key: bool = False
    source: object = None  # a user algorithm's file
    user_curve: object = None  # its compiled gain curve (kept alive here)
    user_detector: object = None  # its compiled level detector
    user_smoother: object = None  # its compiled gain smoother
    user_block: object = None  # its whole kernel, wrapped to the kernel contract (njit)
    user_job: object = None  # the same as a job function for the live callback (cfunc)
    state_size: int = 0  # declared state slots per channel
    boost: bool = False  # the file declares gain above makeup on purpose
    block: int = 0  # a block-based design's own frame size (0: sample by sample)
    latency: int = 0  # a user kernel's declared latency, samples
    stages: tuple = ()  # which stages the file provides
    report: tuple = ()  # the load-time check report, one line each
    digest: str = ""  # hash of the file's text
    module: object = None  # the file's module (its stages and numba helpers)
    precision: str = "float64"  # a user file's compiled precision (built-ins have both)

    def kernel(self, precision="float64"):
        """The kernel of the kind that runs this algorithm, in ``precision`` (a user file's
        own compiled code for a whole kernel)."""
        if self.kind == "user":
            return self.user_block
        from ..dsp.precision import kernel_for

        return kernel_for(self.kind, precision)


def _limiter_schema():
    """The limiter's parameters; its attack is a ramp, not a one-pole, and says so."""
    import dataclasses

    schema = Schema.of(ceiling=-1.0, lookahead=5.0, attack=5.0, release=80.0, hold=0.0,
                       true_peak="off", link="max")
    schema.params["attack"] = dataclasses.replace(
        schema.params["attack"],
        help="length of the straight ramp of the linear gain down to a peak's requirement, "
             "starting when the peak enters the lookahead (at most the lookahead)")
    schema.params["release"] = dataclasses.replace(
        schema.params["release"],
        help="one-pole time constant tau of the recovery in dB (63 % of a step's dB change "
             "after tau), after the lookahead's hold")
    return schema


_KEY = dict(key="main", key_hpf=0.0, key_lpf=0.0, key_bpf=0.0, key_q=1.0, link="max")

BUILTINS = {
    a.name: a
    for a in [
        Algorithm(
            "compressor",
            "downward compressor: above threshold, output rises 1 dB per `ratio` dB of input",
            Schema.of(
                threshold=-20.0, ratio=4.0, knee=6.0, attack=10.0, release=150.0, hold=0.0,
                makeup=0.0, automakeup="off", detector="peak", rms_time=10.0,
                ballistics="branching", domain="log", topology="feedforward", lookahead=0.0,
                mix=100.0, ceiling=0.0, **_KEY,
            ),
            "dynamics", LAW_COMPRESSOR,
        ),
        Algorithm(
            "limiter",
            "lookahead peak limiter: no output sample passes the ceiling when lookahead >= attack",
            _limiter_schema(),
            "limiter", 0,
        ),
        Algorithm(
            "expander",
            "downward expander: below threshold, output falls `ratio` dB per dB, down to -range",
            Schema.of(
                threshold=-45.0, ratio=2.0, knee=6.0, range=40.0, hysteresis=0.0, attack=1.0,
                release=100.0, hold=20.0, start="closed", makeup=0.0, detector="peak", rms_time=10.0,
                lookahead=0.0, mix=100.0, ceiling=0.0, **_KEY,
            ),
            "dynamics", LAW_EXPANDER,
        ),
        Algorithm(
            "gate",
            "noise gate: opens above threshold, closes below threshold - hysteresis, to -range",
            Schema.of(
                threshold=-45.0, hysteresis=4.0, range=60.0, attack=0.5, release=80.0,
                hold=50.0, start="closed", makeup=0.0, detector="peak", rms_time=10.0, lookahead=0.0,
                mix=100.0, ceiling=0.0, **_KEY,
            ),
            "dynamics", LAW_GATE,
        ),
        Algorithm(
            "ducker",
            "key-input ducker: when the key passes threshold the main signal drops, by up to range",
            Schema.of(
                threshold=-35.0, ratio="inf", knee=6.0, range=12.0, attack=15.0, release=400.0,
                hold=250.0, makeup=0.0, detector="rms", rms_time=20.0, ballistics="branching",
                lookahead=0.0, mix=100.0, ceiling=0.0,
                **{**_KEY, "key": "external", "key_hpf": 120.0},
            ),
            "dynamics", LAW_DUCKER, needs_key=True,
        ),
    ]
}
