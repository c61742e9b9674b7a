"""The ``threshold`` detector: chunk invariance, event bounds, merging, splitting, noise, false alarms."""

import numpy as np
import pytest
from impactline import ParameterError
from impactline_plugins.detectors import ThresholdDetector
from impactline_plugins.detectors._common import MAD_TO_SIGMA, detect_array, signature
from scipy import signal, stats

SIGMA = 1e-12  # noise rms of the synthetic records, A


def _pulse(x, start, length, amplitude):
    x[start:start + length] += amplitude


def _spike(x, start, amplitude, tau, length):
    """Instant rise, exponential decay over ``tau`` samples (a typical collision transient)."""
    x[start:start + length] += amplitude * np.exp(-np.arange(length) / tau)


def _busy_record(seed=7, fs=100e3, n=300_000):
    """Drifting baseline, white noise, and events placed across the borders of every chunking tested."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / fs
    x = rng.normal(0.0, SIGMA, n) + 3 * SIGMA * np.sin(2 * np.pi * 0.5 * t) + 2 * SIGMA * t
    for border in (1000 * 37, 4096 * 11, 4096 * 29, 65536, 65536 * 3, 1000 * 250):
        _spike(x, border - 30, 15 * SIGMA, 20, 120)
    for start in (9_990, 130_900, 196_590):  # bursts of sub-spikes, one across a 65536 border
        for k, amplitude in enumerate((9, 14, 8)):
            _pulse(x, start + 25 * k, 8, amplitude * SIGMA)
    _pulse(x, 65536 * 2 - 250, 600, 12 * SIGMA)        # longer than max_duration below: split
    _spike(x, 4096 * 20 - 3, -11 * SIGMA, 15, 90)        # cathodic
    _spike(x, 222_000, -9 * SIGMA, 10, 60)
    for start in rng.integers(1000, n - 1000, 25):       # small ones, some near the trigger level
        _spike(x, int(start), rng.uniform(4, 9) * SIGMA, 10, 60)
    return x, fs


@pytest.mark.parametrize("params", [
    {},
    {"polarity": "both", "merge_gap": "0.3 ms", "max_duration": "2 ms", "min_duration": "50 us",
     "baseline_window": "20 ms"},
])
def test_events_identical_whatever_the_chunking(params):
    x, fs = _busy_record()
    detector = ThresholdDetector(**params)
    reference = signature(detect_array(detector, x, fs, None, check_contract=True))
    assert len(reference) >= 12
    for chunks in (1000, 4096, 65536, [1, 999, 17, 5000, 333]):
        got = signature(detect_array(detector, x, fs, chunks, check_contract=True))
        assert got == reference, f"chunks {chunks}"


def test_rectangular_pulses_found_once_with_their_bounds():
    fs, n = 100e3, 100_000
    rng = np.random.default_rng(3)
    x = rng.normal(0.0, SIGMA, n)
    starts = np.arange(1500, n - 1500, 2400) + rng.integers(-200, 200, 41)
    widths = rng.integers(30, 200, len(starts))
    for s, w in zip(starts, widths, strict=True):
        _pulse(x, s, w, 12 * SIGMA)
    events = detect_array(ThresholdDetector(), x, fs, 4096, check_contract=True)
    assert len(events) == len(starts)
    for event, s, w in zip(events, starts, widths, strict=True):
        # Release at 1 sigma: noise just outside the pulse exceeds it with probability 0.16 per sample.
        assert s - 4 <= event.start_index <= s
        assert s + w <= event.end_index <= s + w + 4
        assert event.extras["n_subpeaks"] == 1
        assert s <= event.extras["peak_index"] < s + w
        assert event.polarity == 1 and event.extras["split"] is False
        assert event.noise_rms_A == pytest.approx(SIGMA, rel=0.05)
        assert abs(event.baseline_A) < 0.1 * SIGMA


def test_burst_merges_into_one_event_within_merge_gap():
    fs, n = 100e3, 40_000
    x = np.random.default_rng(4).normal(0.0, SIGMA, n)
    for k, amplitude in enumerate((12, 15, 25, 12)):  # four sub-spikes 20 samples apart, third tallest
        _pulse(x, 20_000 + 30 * k, 10, amplitude * SIGMA)
    merged = detect_array(ThresholdDetector(merge_gap="0.5 ms"), x, fs, 1000, check_contract=True)
    assert len(merged) == 1
    assert merged[0].extras["n_subpeaks"] == 4
    assert 20_060 <= merged[0].extras["peak_index"] < 20_070
    assert merged[0].start_index <= 20_000 and merged[0].end_index >= 20_100
    apart = detect_array(ThresholdDetector(merge_gap=0), x, fs, 1000, check_contract=True)
    assert [e.extras["n_subpeaks"] for e in apart] == [1, 1, 1, 1]
    # Merging never makes an event longer than max_duration.
    capped = detect_array(ThresholdDetector(merge_gap="0.5 ms", max_duration="0.5 ms"), x, fs, 1000)
    assert len(capped) == 2 and all(e.end_index - e.start_index <= 50 for e in capped)
    assert sum(e.extras["n_subpeaks"] for e in capped) == 4


def test_min_duration_drops_short_events():
    fs, n = 100e3, 60_000
    x = np.random.default_rng(5).normal(0.0, SIGMA, n)
    for k in range(10):
        _pulse(x, 3000 + 5000 * k, 20 if k % 2 else 200, 12 * SIGMA)
    everything = detect_array(ThresholdDetector(), x, fs)
    long_only = detect_array(ThresholdDetector(min_duration="1 ms"), x, fs)
    assert len(everything) == 10
    assert [(e.start_index + 10) // 1000 for e in long_only] == [3, 13, 23, 33, 43]


def test_long_excursion_is_split_at_max_duration():
    fs, n = 100e3, 50_000
    x = np.random.default_rng(6).normal(0.0, SIGMA, n)
    _pulse(x, 20_000, 1000, 12 * SIGMA)
    events = detect_array(ThresholdDetector(max_duration="3 ms"), x, fs, 777, check_contract=True)
    assert len(events) == 4
    start = events[0].start_index
    assert 19_996 <= start <= 20_000
    assert [e.start_index - start for e in events] == [0, 300, 600, 900]
    assert all(e.end_index == f.start_index for e, f in zip(events, events[1:], strict=False))
    assert 21_000 <= events[-1].end_index <= 21_004
    assert all(e.extras["split"] for e in events)


def test_polarity_selects_the_direction():
    fs, n = 100e3, 40_000
    x = np.random.default_rng(8).normal(0.0, SIGMA, n)
    _pulse(x, 5_000, 50, 12 * SIGMA)
    _pulse(x, 15_000, 50, -12 * SIGMA)
    _pulse(x, 25_000, 50, 12 * SIGMA)
    _pulse(x, 25_080, 50, -12 * SIGMA)  # opposite directions 30 samples apart never merge
    found = {}
    for polarity in ("anodic", "cathodic", "both"):
        # Release at 1 sigma (not the default, the baseline) so starts sit within a sample of the pulses.
        events = detect_array(ThresholdDetector(polarity=polarity, release_sigma=1), x, fs, 4096,
                              check_contract=True)
        found[polarity] = [((e.start_index + 5) // 10 * 10, e.polarity) for e in events]
    assert found["anodic"] == [(5000, 1), (25000, 1)]
    assert found["cathodic"] == [(15000, -1), (25080, -1)]
    assert found["both"] == [(5000, 1), (15000, -1), (25000, 1), (25080, -1)]


def test_baseline_follows_a_drift():
    fs, n = 100e3, 400_000
    t = np.arange(n) / fs
    drift = 10 * SIGMA * np.sin(2 * np.pi * 0.2 * t) + 5 * SIGMA * t
    x = drift + np.random.default_rng(9).normal(0.0, SIGMA, n)
    starts = np.arange(2_000, n - 2_000, 9_000)
    for s in starts:
        _pulse(x, s, 40, 15 * SIGMA)
    events = detect_array(ThresholdDetector(), x, fs, 65536)
    # One genuine 5.2-sigma noise sample in this record (4e5 x Q(5) = 0.11 expected) is allowed for.
    events = [e for e in events if np.min(np.abs(starts - e.start_index)) <= 4]
    assert len(events) == len(starts)
    # Block-median error ~1.25 sigma/sqrt(10^4) plus the interpolation error of the sine, about
    # (0.1 s)^2 / 8 x its second derivative = 0.02 sigma: 0.1 sigma leaves room.
    errors = [e.baseline_A - drift[e.start_index] for e in events]
    assert np.max(np.abs(errors)) < 0.1 * SIGMA


def _coloured_noise(rng, n, fs, fc):
    """White plus f^2 (differentiated) noise through a 4-pole Bessel low-pass: a patch-clamp-like spectrum."""
    white = rng.normal(size=n + 1)
    raw = 0.3 * white[1:] + np.diff(rng.normal(size=n + 1)) * 2.0
    sos = signal.bessel(4, fc, fs=fs, norm="mag", output="sos")
    return signal.sosfilt(sos, raw)


def test_noise_about_the_trigger_level_does_not_count_as_subpeaks():
    # Slowly decaying spikes on filtered noise cross the 5-sigma trigger level several times on the way down;
    # one excursion is still one (the count once took every crossing: 1 right out of 138 simulated spikes).
    fs, n = 250e3, 300_000
    rng = np.random.default_rng(12)
    noise = _coloured_noise(rng, n, fs, 25e3)
    sigma = np.std(noise[1000:])
    x = noise.copy()
    starts = np.arange(3_000, n - 3_000, 4_000)
    for s in starts:
        _spike(x, s, 20 * sigma, 400, 3000)
    events = detect_array(ThresholdDetector(merge_gap=0), x, fs, 65536)
    assert len(events) == len(starts)
    crossings = []
    for e in events:
        above = (x[e.start_index:e.end_index] - e.baseline_A) > 5 * e.noise_rms_A
        crossings.append(int(np.sum(above[1:] & ~above[:-1]) + above[0]))
    assert np.mean(np.array(crossings) > 1) > 0.5  # the noise does carry most of them across the trigger
    assert all(e.extras["n_subpeaks"] == 1 for e in events)


def test_noise_estimate_is_the_spread_of_coloured_noise_even_with_events():
    fs, n = 250e3, 500_000
    rng = np.random.default_rng(10)
    noise = _coloured_noise(rng, n, fs, 25e3)
    sigma = np.std(noise[1000:])  # reference: the plain standard deviation of the noise alone
    x = noise.copy()
    starts = np.arange(3_000, n - 3_000, 2_500)  # 200 events covering 8 % of the record
    for s in starts:
        _spike(x, s, 40 * sigma, 40, 200)
    events = detect_array(ThresholdDetector(release_sigma=1), x, fs, 65536)
    # Correlated noise holds the signal above the release level for a few samples at a time, so starts
    # move earlier by up to ~1/fc; a noise bump on a decaying tail may add a separate small event.
    matched = [e for e in events if np.min(np.abs(starts - e.start_index)) <= 8]
    assert len(matched) == len(starts) and len(events) - len(matched) <= 3
    estimates = np.array([e.noise_rms_A for e in events[5:]])  # past the filter's start-up transient
    assert np.all(np.abs(estimates / sigma - 1.0) < 0.05)
    # Why not first differences: for this spectrum they see about half of the noise (lag-1 correlation
    # ~0.75; differences have variance 2 sigma^2 (1 - rho_1)), so a threshold set from them would fire on
    # noise all the time.
    from_differences = MAD_TO_SIGMA * np.median(np.abs(np.diff(noise))) / np.sqrt(2)
    rho_1 = np.corrcoef(noise[1:], noise[:-1])[0, 1]
    assert from_differences / sigma == pytest.approx(np.sqrt(1 - rho_1), rel=0.03)
    assert from_differences < 0.6 * sigma


def _expected_events_per_sample(k_sigma, release_sigma):
    """Mean number of events per sample on independent N(0, 1) samples (one-sided, no merging).

    An event is a run of samples above the release level holding at least one above the trigger level.
    Per-sample probabilities p = Q(release), q = Q(k) with Q the Gaussian upper tail (scipy.stats.norm.sf);
    runs start with probability (1 - p) p per sample, have geometric lengths, and hold no trigger sample
    with probability sum_l p^(l-1) (1-p) (1-q/p)^l, which gives the rate q (1 - p) / (1 - p + q).
    Computed here (run combinatorics); for q << p it is essentially q, the Gaussian tail itself.
    """
    p, q = stats.norm.sf(release_sigma), stats.norm.sf(k_sigma)
    return q * (1 - p) / (1 - p + q)


@pytest.mark.parametrize("k_sigma", [3.5, 4.0])
def test_false_event_rate_on_gaussian_noise_matches_the_tail(k_sigma):
    fs, n = 250e3, 1 << 20
    x = np.random.default_rng(int(k_sigma * 10)).normal(0.0, SIGMA, n)
    events = detect_array(ThresholdDetector(k_sigma=k_sigma, merge_gap=0), x, fs, 65536)
    expected = n * _expected_events_per_sample(k_sigma, 1.0)
    # Counts are Poisson; a 1 % error of the noise estimate would move them by ~4 k %.
    assert abs(len(events) - expected) < 4 * np.sqrt(expected), (len(events), expected)


def test_default_settings_stay_below_one_false_event_per_10_s_at_250_kHz():
    fs = 250e3
    expected_per_10s = 10 * fs * _expected_events_per_sample(5.0, 1.0)
    assert expected_per_10s == pytest.approx(0.717, abs=0.001)  # 2.5e6 x Q(5) = 2.5e6 x 2.867e-7
    n = int(10 * fs)
    rng = np.random.default_rng(2024)
    x = np.concatenate([rng.normal(0.0, SIGMA, n // 4) for _ in range(4)])
    events = detect_array(ThresholdDetector(), x, fs, 1 << 16)
    # Under the Gaussian tail the count is Poisson(0.72): P(count >= 4) = 0.6 %. An estimator 10 % low
    # would give Poisson(8.5) here and fail.
    assert len(events) <= 3, [(e.start_index, e.extras) for e in events]


def test_fixed_noise_overrides_the_estimate():
    fs, n = 100e3, 30_000
    x = np.random.default_rng(12).normal(0.0, SIGMA, n)
    _pulse(x, 10_000, 50, 8 * SIGMA)
    events = detect_array(ThresholdDetector(noise_rms="1 pA"), x, fs)
    assert len(events) == 1 and events[0].noise_rms_A == 1e-12
    assert detect_array(ThresholdDetector(noise_rms="3 pA"), x, fs) == []  # 8 pA + noise < 5 x 3 pA


def test_parameter_errors_name_the_parameter():
    with pytest.raises(ParameterError, match="release_sigma.*<= k_sigma"):
        ThresholdDetector(k_sigma=3, release_sigma=4)
    with pytest.raises(ParameterError, match="polarity"):
        ThresholdDetector(polarity="anodics")
    with pytest.raises(ParameterError, match="baseline_window.*expected at least 32 samples"):
        ThresholdDetector(baseline_window="100 us").start(100e3)
    with pytest.raises(ParameterError, match="max_duration"):
        ThresholdDetector(max_duration="1 us").start(100e3)
    detector = ThresholdDetector()
    state = detector.start(100e3)
    _, state = detector.process(np.zeros(100), 0, state)
    with pytest.raises(ValueError, match="expected first_index 100, got 150"):
        detector.process(np.zeros(100), 150, state)


def test_lookback_covers_max_duration_and_two_blocks():
    detector = ThresholdDetector(max_duration="10 ms", baseline_window="50 ms")
    assert detector.lookback_samples(100e3) == 1000 + 2 * 5000 + 1


def test_detectors_sharing_a_memo_find_exactly_what_each_finds_alone(monkeypatch):
    # A comparison hands the detectors fed the same samples one memo (Detector.start_shared); threshold
    # detectors with the same baseline window then compute each block's level and noise once. Interleaved
    # chunks, as a comparison feeds them; different k, release and polarity; a different window too.
    x, fs = _busy_record()
    variants = [ThresholdDetector(k_sigma=5), ThresholdDetector(k_sigma=4, merge_gap="300 us"),
                ThresholdDetector(k_sigma=6, release_sigma=2, polarity="both"),
                ThresholdDetector(k_sigma=5, baseline_window="30 ms"), ThresholdDetector(k_sigma=4.5)]
    alone = [signature(detect_array(d, x, fs, 7000)) for d in variants]
    noise_calls = []
    original = ThresholdDetector._noise
    monkeypatch.setattr(ThresholdDetector, "_noise", lambda self, r: noise_calls.append(1) or original(self, r))
    memo: dict = {}
    states = [d.start_shared(fs, memo) for d in variants]
    shared: list[list] = [[] for _ in variants]
    for at in range(0, x.size, 7000):
        for i, d in enumerate(variants):
            events, states[i] = d.process(x[at:at + 7000], at, states[i])
            shared[i] += events
        # Entries are dropped once every sharer has read them: the memo stays small however long the stream.
        assert all(len(book.values) <= 4 for book in memo.values())
    for i, d in enumerate(variants):
        shared[i] += d.finish(states[i])
    assert [signature(events) for events in shared] == alone
    assert all(len(events) > 10 for events in alone)
    # Levels and residuals: one book each per window (100 ms, 30 ms); noise: one per window and polarity,
    # each block's noise computed once per book (30 blocks of 100 ms, 100 of 30 ms), not once per detector.
    assert len(memo) == 7
    assert len(noise_calls) == 30 + 30 + 100
