"""Shared pieces of the bundled detectors: registration, the sample buffer, the robust noise estimate."""

import numpy as np
import pytest
from impactline import Event
from impactline.registry import PluginRegistry, check_stage_class
from impactline_plugins.detectors import STAGES, CusumDetector, ThresholdDetector
from impactline_plugins.detectors._common import (
    MAD_TO_SIGMA,
    SampleBuffer,
    check_chunk,
    detect_array,
    median,
    robust_sigma,
)
from scipy import stats


def test_detectors_are_registered_through_the_plugin_hook():
    registry = PluginRegistry()
    names = {entry.name for entry in registry.stages("detector")}
    assert {"threshold", "cusum"} <= names
    assert registry.get("detector", "threshold").cls is ThresholdDetector
    assert registry.get("detector", "cusum").plugin == "bundled"
    for cls in STAGES:
        assert check_stage_class(cls) == []


def test_mad_constant_is_the_inverse_normal_quartile():
    # 1 / Phi^-1(3/4): Hampel (1974), JASA 69:383; scipy.stats as the reference library.
    assert MAD_TO_SIGMA == pytest.approx(1.0 / stats.norm.ppf(0.75), rel=1e-15)


@pytest.mark.parametrize("n", [1, 2, 7, 10, 4096, 4097])
def test_median_matches_numpy(n):
    values = np.random.default_rng(n).normal(size=n)
    assert median(values) == pytest.approx(float(np.median(values)), rel=1e-15, abs=1e-300)


@pytest.mark.parametrize("n", [1, 2, 7, 10, 8192, 8193])
def test_row_medians_match_numpy_exactly_and_leave_the_input_alone(n):
    from impactline.robust import row_medians

    values = np.random.default_rng(n).normal(size=(5, n))
    before = values.copy()
    # numpy.median as the reference library; the same two middle values and the same mean of them, so equal.
    np.testing.assert_array_equal(row_medians(values), np.median(values, axis=1))
    np.testing.assert_array_equal(values, before)
    strided = np.random.default_rng(n + 1).normal(size=(3, 8 * n))[:, ::8]   # a view, as the noise meter passes
    np.testing.assert_array_equal(row_medians(strided), np.median(strided, axis=1))


def test_robust_sigma_of_gaussian_and_contaminated_samples():
    rng = np.random.default_rng(11)
    clean = rng.normal(3.0, 2.0, 200_000)
    # The MAD estimate has standard error about 1.166 sigma / sqrt(n) (asymptotic efficiency 37 %,
    # Huber 1981, Robust Statistics; from memory): 0.005 here, so 2 % is a 7-SE tolerance.
    assert robust_sigma(clean) == pytest.approx(2.0, rel=0.02)
    dirty = clean.copy()
    dirty[::10] += 40.0  # 10 % of samples in large one-sided excursions
    assert robust_sigma(dirty) == pytest.approx(2.0, rel=0.20)
    assert np.std(dirty) > 5.0  # the plain standard deviation is ruined
    quantised = np.round(rng.normal(0.0, 0.2, 10_000))  # most samples identical: MAD = 0
    assert robust_sigma(quantised) > 0.0
    assert robust_sigma(np.zeros(5)) == 0.0


def test_sample_buffer_keeps_absolute_indices_across_growth_and_discards():
    buf = SampleBuffer(origin=100)
    data = np.arange(100, 100 + 50_000, dtype=float)  # value == absolute index
    pos = 0
    for size in [1, 7, 4096, 3, 10_000, 20_000, 15_893]:
        buf.append(data[pos:pos + size])
        pos += size
        buf.discard_before(100 + pos - 5000)
        a = max(buf.start, 100 + pos - 3000)
        np.testing.assert_array_equal(buf.view(a, buf.end), np.arange(a, 100 + pos, dtype=float))
    assert buf.end == 100 + 50_000
    with pytest.raises(IndexError):
        buf.view(buf.start - 1, buf.end)


def test_check_chunk_names_the_bad_sample_and_the_gap():
    with pytest.raises(ValueError, match="sample 1003 is nan"):
        check_chunk("threshold", np.array([0.0, 1.0, 2.0, np.nan]), 1000, 1000)
    with pytest.raises(ValueError, match="expected first_index 500, got 600"):
        check_chunk("threshold", np.zeros(3), 600, 500)
    with pytest.raises(ValueError, match="1-D"):
        check_chunk("threshold", np.zeros((2, 2)), 0, None)
    # Finite values whose sum overflows are still finite samples; inf is named wherever it sits.
    huge = np.array([1e308, 1e308, -5.0])
    assert check_chunk("threshold", huge, 0, None) is not None
    with pytest.raises(ValueError, match="sample 7 is -inf"):
        check_chunk("threshold", np.array([1.0, 2.0, -np.inf, 1e308]), 5, None)
    with pytest.raises(ValueError, match="sample 3 is inf"):   # inf - inf: the sum is nan, the first bad is named
        check_chunk("threshold", np.array([0.0, np.inf, -np.inf]), 2, None)


class _LateDetector(ThresholdDetector):
    """Breaks the contract on purpose: holds its events back until the end of the stream."""

    name = "late"

    def process(self, x, first_index, state):
        events, state = super().process(x, first_index, state)
        state.late = getattr(state, "late", []) + events
        return [], state

    def finish(self, state):
        return getattr(state, "late", []) + super().finish(state)


def test_contract_check_catches_events_emitted_too_late():
    fs = 50e3
    x = np.random.default_rng(2).normal(0.0, 1e-12, 40_000)
    x[1000:1100] += 20e-12
    detector = _LateDetector(baseline_window="10 ms")
    assert len(detect_array(detector, x, fs, 1000)) == 1
    with pytest.raises(AssertionError, match="further back than lookback_samples"):
        detect_array(detector, x, fs, 1000, check_contract=True)


@pytest.mark.parametrize("cls", STAGES)
def test_empty_and_tiny_streams(cls):
    detector = cls()
    state = detector.start(250e3)
    assert detector.finish(state) == []
    events = detect_array(detector, np.zeros(10), 250e3, 3, check_contract=True)
    assert all(isinstance(e, Event) for e in events)
    assert isinstance(CusumDetector().lookback_samples(250e3), int)


@pytest.mark.parametrize("cls", STAGES)
def test_blocks_are_counted_from_the_first_sample_of_the_stream(cls):
    # A stream that starts at absolute index 123457 gives the same events, shifted by that offset.
    fs = 100e3
    rng = np.random.default_rng(9)
    x = rng.normal(0.0, 1e-12, 60_000)
    for start in (5_000, 23_000, 41_000):
        x[start:start + 400] += 8e-12
    offset = 123_457
    plain = detect_array(cls(), x, fs, 4096)
    shifted = detect_array(cls(), x, fs, 4096, first_index=offset)
    assert len(plain) >= 3
    for a, b in zip(plain, shifted, strict=True):
        assert (b.start_index - offset, b.end_index - offset) == (a.start_index, a.end_index)
        assert (b.baseline_A, b.noise_rms_A, b.polarity) == (a.baseline_A, a.noise_rms_A, a.polarity)
        if "peak_index" in a.extras:
            assert b.extras["peak_index"] - offset == a.extras["peak_index"]
