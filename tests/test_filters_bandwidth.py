"""Bandwidth of filter chains (impactline.bandwidth): -3 dB point, rise time, delay, cascade rule."""

import math
from typing import ClassVar

import numpy as np
import pytest
from impactline import Filter, FilterInfo
from impactline.bandwidth import (
    cascade_info,
    explain_cascade,
    gaussian_cascade_cutoff,
    minus_3db_frequency,
    rise_time_10_90,
    run_filters,
)
from impactline_plugins.filters import Bessel

FS = 250e3


class _Clip(Filter):
    """A non-linear stage (no frequency response) for the notes of explain_cascade."""

    name: ClassVar[str] = "clip-test"
    summary: ClassVar[str] = "clips the current (test stage)"

    def start(self, sample_rate_hz):
        return None

    def process(self, x, state):
        return np.clip(x, -1.0, 1.0), state

    def finish(self, state):
        return np.empty(0)

    def info(self, sample_rate_hz):
        return FilterInfo(delay_s=3e-6)


def test_gaussian_cascade_rule():
    # 10 kHz with 5 kHz -> 4.472 kHz: Colquhoun & Sigworth (1995), Single-Channel Recording 2nd ed.;
    # value from /work/shared/REFERENCES.md.
    assert gaussian_cascade_cutoff(10e3, 5e3) == pytest.approx(4472.136, abs=1e-3)
    assert gaussian_cascade_cutoff(7e3) == pytest.approx(7e3, rel=1e-15)
    assert gaussian_cascade_cutoff(10e3, 10e3) == pytest.approx(10e3 / math.sqrt(2))
    with pytest.raises(ValueError, match="> 0 Hz"):
        gaussian_cascade_cutoff(10e3, 0.0)
    with pytest.raises(ValueError, match="at least one"):
        gaussian_cascade_cutoff()


def test_root_find_is_exact_for_gaussian_responses():
    # Gaussian filter: |H(f)|^2 = exp(-ln2 (f/fc)^2) (power half at fc); a product of Gaussians is a
    # Gaussian, so the numerical -3 dB point must reproduce the cascade rule to the root-find precision.
    def gaussian_power(fc):
        return lambda f: np.exp(-math.log(2) * (np.asarray(f) / fc) ** 2)

    g1, g2, g3 = gaussian_power(10e3), gaussian_power(5e3), gaussian_power(30e3)
    found = minus_3db_frequency(lambda f: g1(f) * g2(f) * g3(f), FS)
    assert found == pytest.approx(gaussian_cascade_cutoff(10e3, 5e3, 30e3), rel=1e-11)
    assert minus_3db_frequency(lambda f: np.ones(len(f)), FS) is None


def test_rise_time_of_first_order_step():
    # First-order (RC) step response 1 - exp(-t/tau): 10-90 % rise time = tau ln 9 (common practice).
    fs = 1e6
    tau = 50e-6
    t = np.arange(-100, 20_000) / fs
    y = np.where(t >= 0, 1 - np.exp(-np.clip(t, 0, None) / tau), 0.0)
    assert rise_time_10_90(y, fs) == pytest.approx(tau * math.log(9), rel=1e-4)
    assert rise_time_10_90(1.0 - y, fs) == pytest.approx(tau * math.log(9), rel=1e-4)  # falling step
    assert rise_time_10_90(np.ones(10), fs) is None


@pytest.mark.parametrize("mode", ["causal", "zero-phase"])
def test_two_bessel_filters_cascade_near_the_gaussian_rule(mode):
    # 10 kHz and 5 kHz in series: 4.472 kHz for Gaussian filters (Colquhoun & Sigworth 1995); Bessel
    # filters are only near-Gaussian, so the stated tolerance is 2 % (measured: +1.4 % causal 4-pole,
    # +0.75 % zero-phase 4-pole at 250 kHz sampling).
    first, second = Bessel(order=4, cutoff="10 kHz", mode=mode), Bessel(order=4, cutoff="5 kHz", mode=mode)
    report = explain_cascade([first, second], FS)
    expected = gaussian_cascade_cutoff(10e3, 5e3)
    assert report.info.cutoff_hz == pytest.approx(expected, rel=0.02)
    assert report.info.cutoff_hz < 5e3
    # The product response really is -3 dB there.
    h = first.frequency_response(np.array([report.info.cutoff_hz]), FS) * second.frequency_response(
        np.array([report.info.cutoff_hz]), FS)
    assert np.abs(h[0]) ** 2 == pytest.approx(0.5, rel=1e-9)
    # Rise times add nearly in quadrature (exact for Gaussians: Colquhoun & Sigworth 1995, Single-Channel
    # Recording, 2nd ed., same rule as the cutoff); within 3 % for these Bessel filters.
    r1, r2 = first.info(FS).rise_time_s, second.info(FS).rise_time_s
    assert report.info.rise_time_s == pytest.approx(math.hypot(r1, r2), rel=0.03)
    assert report.info.rise_time_s > max(r1, r2)
    assert report.info.delay_s == pytest.approx(first.info(FS).delay_s + second.info(FS).delay_s, abs=1e-15)
    assert report.bandwidth_stages == ["bessel", "bessel"] and report.notes == []


def test_single_filter_chain_reproduces_its_info():
    stage = Bessel(order=6, cutoff="8 kHz", mode="causal")
    own, chain = stage.info(FS), cascade_info([stage], FS)
    assert chain.cutoff_hz == pytest.approx(own.cutoff_hz, rel=1e-10)
    assert chain.rise_time_s == pytest.approx(own.rise_time_s, rel=1e-12)
    assert chain.delay_s == own.delay_s


def test_nonlinear_stage_is_skipped_with_a_note():
    stage = Bessel(order=4, cutoff="10 kHz", mode="causal")
    report = explain_cascade([_Clip(), stage], FS)
    assert report.info.cutoff_hz == pytest.approx(10e3, rel=1e-9)
    assert report.info.delay_s == pytest.approx(stage.info(FS).delay_s + 3e-6, abs=1e-15)
    assert len(report.notes) == 1 and report.notes[0].startswith("clip-test: no frequency response")
    only_clip = explain_cascade([_Clip()], FS)
    assert only_clip.info.cutoff_hz is None and only_clip.info.rise_time_s is None
    assert only_clip.info.delay_s == 3e-6


def test_run_filters_chunking_keeps_length():
    x = np.random.default_rng(3).standard_normal(10_001)
    chain = [Bessel(cutoff="20 kHz"), Bessel(cutoff="30 kHz", mode="causal")]
    whole = run_filters(chain, x, FS)
    chunked = run_filters(chain, x, FS, chunk_samples=999)
    assert whole.shape == chunked.shape == x.shape
    assert np.max(np.abs(whole - chunked)) < 1e-9 * np.std(x)


def test_leading_edge_list_path_equals_the_array_path(monkeypatch):
    # leading_edge first looks at an event's first samples as a Python list (faster per event) and falls back
    # to whole-array numpy searches when a search runs past them; both must give the same numbers, bit for bit.
    import impactline.bandwidth as bandwidth

    rng = np.random.default_rng(21)
    cases = []
    for _ in range(3000):
        n = int(rng.integers(1, 600))
        kind = rng.integers(0, 4)
        if kind == 0:      # a decaying spike in noise, maybe after some context
            y = 150 * np.exp(-np.arange(n) / rng.uniform(2, 300)) + rng.uniform(0, 20) * rng.standard_normal(n)
        elif kind == 1:    # a slow ramp: the first peak lies beyond the list
            y = np.linspace(0, 100, n) + rng.standard_normal(n)
        elif kind == 2:    # a random walk, rectified or not
            y = rng.standard_normal(n).cumsum() * rng.uniform(0.1, 3)
            y = np.abs(y) if rng.random() < 0.5 else y
        else:              # a step that never comes back down
            y = np.r_[rng.uniform(-5, 5, int(rng.integers(0, 6))), np.full(n, 60.0)]
            y = y + rng.standard_normal(y.size)
        start = int(rng.integers(0, min(y.size, 8)))
        cases.append((y, float(rng.choice([0.5, 1.0, 3.0, 10.0])), start, int(rng.choice([0, 1, 4]))))
    fast = [bandwidth.leading_edge(y, noise, start=start, lookback=lb) for y, noise, start, lb in cases]
    monkeypatch.setattr(bandwidth, "_leading_edge_list", lambda *args: False)
    slow = [bandwidth.leading_edge(y, noise, start=start, lookback=lb) for y, noise, start, lb in cases]
    assert [a is None for a in fast] == [b is None for b in slow]
    for a, b in zip(fast, slow, strict=True):
        if a is not None:
            np.testing.assert_array_equal(np.array(a, dtype=float), np.array(b, dtype=float))
