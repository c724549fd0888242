"""Settings tables shared by the twin tests (tests/test_bench.py: the plain-Python twin;
tests/test_ctwin.py: the plain-C twin), so that both twins are held to the same cases.

Each entry is ``(settings, schedule)``: the limiter's starting settings and, per block index,
the changes applied before that block. The cases were chosen to reach every branch of
:func:`livedyn.dsp.limiter.limiter_block`: the true-peak path, unlinked channels with hold,
zero attack under a low ceiling, and lookahead, ceiling, link and true-peak changes while the
ceiling is at work.
"""

LIMITER_CASES = [
    (dict(true_peak="on"), None),
    (dict(link="none", hold=4.0, release=20.0), None),
    (dict(attack=0.0, lookahead=1.0, ceiling=-12.0), None),
    (dict(lookahead=5.0), {4: dict(true_peak="on"), 9: dict(lookahead=8.0, attack=3.0),
                           13: dict(lookahead=3.0), 16: dict(ceiling=-6.0),
                           22: dict(attack=1.0, true_peak="off")}),
    (dict(lookahead=2.0, release=20.0), {3: dict(link="none"), 9: dict(link="max"),
                                           12: dict(true_peak="on"), 13: dict(link="none"),
                                           15: dict(true_peak="off", lookahead=0.1),
                                           20: dict(link="max", lookahead=0.0),
                                           21: dict(true_peak="on")}),
]
LIMITER_IDS = ["true-peak", "link-none+hold", "attack-0", "changes-mid-stream",
               "link-and-true-peak"]
