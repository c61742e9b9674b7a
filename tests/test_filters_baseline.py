"""Baseline removal by running median / percentile: reference library, exact streaming, drift, events."""

import numpy as np
import pytest
from impactline import ParameterError
from impactline.bandwidth import explain_cascade, run_filters
from impactline_plugins.filters import Baseline, Bessel
from scipy import ndimage

FS = 20e3


def _drifting(n=60_000, seed=0):
    """Drifting baseline (ramp + slow sine, 1 nA level), 3 pA noise and 30 pA events of 0.5-2 ms."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / FS
    drift = 1e-9 + 40e-12 * t + 15e-12 * np.sin(2 * np.pi * 0.4 * t)
    x = drift + 3e-12 * rng.standard_normal(n)
    events = np.zeros(n)
    for start in range(1_000, n - 1_000, 2_345):
        events[start:start + 10 + start % 30] = 30e-12
    return t, x + events, drift, events


@pytest.mark.parametrize("percentile", [50.0, 10.0, 0.0, 100.0])
def test_equals_scipy_percentile_filter(percentile):
    # Reference: scipy.ndimage.percentile_filter over the same centred window, ends mirrored ("reflect").
    _, x, _, _ = _drifting()
    stage = Baseline(window="0.25 s", percentile=percentile)
    size = stage.window_samples(FS)
    assert size == 5001
    expected = x - ndimage.percentile_filter(x, percentile, size=size, mode="reflect")
    np.testing.assert_array_equal(run_filters([stage], x, FS), expected)


def test_chunked_equals_whole_exactly():
    _, x, _, _ = _drifting()
    stage = Baseline(window="0.1 s")
    whole = run_filters([stage], x, FS)
    # Chunks smaller and larger than the half window (1000 samples), and the whole minus one sample.
    for chunk in (37, 999, 4096, 10_007, len(x) - 1):
        np.testing.assert_array_equal(run_filters([stage], x, FS, chunk_samples=chunk), whole)


def test_recording_shorter_than_the_window():
    x = np.random.default_rng(1).standard_normal(300)
    stage = Baseline(window="0.1 s")  # 2001 samples: the recording is mirrored several times
    expected = x - ndimage.median_filter(x, size=2001, mode="reflect")
    np.testing.assert_array_equal(run_filters([stage], x, FS), expected)
    np.testing.assert_array_equal(run_filters([stage], x, FS, chunk_samples=13), expected)


def test_latency_is_half_the_window():
    stage = Baseline(window="0.1 s")
    state = stage.start(FS)
    out, state = stage.process(np.zeros(5_000), state)
    assert out.size == 5_000 - 1_000
    out, state = stage.process(np.zeros(500), state)  # outputs wait for half a window's worth
    assert out.size == 0
    out, state = stage.process(np.zeros(500), state)
    assert out.size == 1_000
    assert stage.finish(state).size == 1_000


def test_drift_removed_and_events_kept():
    _, x, drift, events = _drifting()
    y = run_filters([Baseline(window="0.2 s")], x, FS)
    residual = y - events
    # The drift (70 pA over the record) is gone: what is left is the noise plus a small median bias from
    # the events (they fill ~1 % of each window).
    assert np.std(drift) > 10 * 3e-12
    assert np.std(residual) < 1.2 * 3e-12
    assert abs(np.mean(residual)) < 0.5e-12
    # Events keep their height (30 pA): mean excursion over event samples.
    assert np.mean(y[events > 0]) == pytest.approx(30e-12, rel=0.05)


def test_window_too_short_and_info():
    with pytest.raises(ParameterError) as excinfo:
        Baseline(window="50 us").start(FS)
    message = str(excinfo.value)
    assert "'window'" in message and "3 samples" in message and "20 kHz" in message
    info = Baseline().info(FS)
    assert info.cutoff_hz is None and info.delay_s == 0.0
    assert Baseline().frequency_response(np.array([0.0]), FS) is None
    report = explain_cascade([Baseline(), Bessel(cutoff="2 kHz")], FS)
    assert report.info.cutoff_hz == pytest.approx(2e3, rel=1e-9)
    assert report.notes[0].startswith("baseline: no frequency response")
