"""The measuring parts of livedyn/bench/live.py on known inputs (no stream needed)."""
import numpy as np
import pytest
import scipy.signal as sps

from livedyn.bench.live import find_delay, percentile_share


@pytest.mark.parametrize("delay", [0, 1, 64, 128, 1999])
def test_latency_finder_recovers_a_known_delay_exactly(delay):
    # an MLS (scipy.signal.max_len_seq) delayed by a known amount, scaled, with noise at -20 dB
    mls = sps.max_len_seq(12)[0].astype(np.float64) * 2 - 1
    sent = np.concatenate([mls, np.zeros(3000)])
    rng = np.random.default_rng(delay)
    got = np.zeros_like(sent)
    got[delay:] = 0.5 * sent[: len(sent) - delay]
    got += 0.05 * rng.standard_normal(len(got))
    d, corr = find_delay(sent, got, 2500)
    assert d == delay
    assert corr > 0.5


def test_latency_finder_reports_no_correlation_for_unrelated_noise():
    rng = np.random.default_rng(0)
    a, b = rng.standard_normal(8192), rng.standard_normal(8192)
    _, corr = find_delay(a, b, 1000)
    assert corr < 0.1


def test_percentile_share_on_a_synthetic_timing_series():
    # 1000 callback times of 10 us with 1 % at 100 us, against a 1333.33 us period: numpy's
    # linear-interpolation percentile, worked out by hand
    period = 1e9 * 64 / 48000
    t = np.full(1000, 10_000.0)
    t[::100] = 100_000.0
    assert percentile_share(t, period, 50) == pytest.approx(10_000 / period)
    assert percentile_share(t, period, 99.9) == pytest.approx(100_000 / period)
    assert percentile_share(t, period, 98) == pytest.approx(10_000 / period)


def test_instances_per_core():
    from livedyn.bench.sweep import instances_per_core

    # 48 kHz: one frame every 20833 ns; 70 % of that is 14583 ns; at 60 ns per frame, 243
    assert instances_per_core(60.0, 48000) == 243
    assert instances_per_core(20000.0, 48000) == 0
    assert instances_per_core(None, 48000) is None
