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
    # Release at 1 sigma (the default is 0): noise just outside a pulse exceeds it with probability 0.16 per
    # sample, so a bound lies more than 4 samples out with probability 0.16^5 = 1e-4. At release 0 that is
    # 0.5^5 = 3 % per bound, and some of the 82 bounds here would fall outside whatever the detector did.
    events = detect_array(ThresholdDetector(release_sigma=1), x, fs, 4096, check_contract=True)
    assert len(events) == len(starts)
    for event, s, w in zip(events, starts, widths, strict=True):
        assert s - 4 <= event.start_index <= s
        assert s + w <= event.end_index <= s + w + 4
        assert event.extras["n_subpeaks"] == 1
        assert s <= event.extras["peak_index"] < s + w
        assert event.polarity == 1 and event.extras["split"] is False
        # 1.4826 x quiet-side MAD of 5,000 samples (10,000-sample blocks, stride 2): standard error
        # 1.789 sigma / sqrt(5000) = 2.5 % (derivation at _difference_standard_errors); 4 of them. abs=0, or
        # approx's default absolute tolerance (1e-12) would accept anything from 0 to 2 pA.
        assert event.noise_rms_A == pytest.approx(SIGMA, rel=4 * 1.789 / np.sqrt(5000), abs=0)
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
    # The whole-block estimator first (stat_samples = 0): the figures of docs/detectors.md.
    events = detect_array(ThresholdDetector(release_sigma=1, stat_samples=0), x, fs, 65536)
    # Correlated noise holds the signal above the release level for a few samples at a time, so starts
    # move earlier by up to ~1/fc; a noise bump on a decaying tail may add a separate small event.
    matched = [e for e in events if np.min(np.abs(starts - e.start_index)) <= 8]
    assert len(matched) == len(starts) and len(events) - len(matched) <= 3
    estimates = np.array([e.noise_rms_A for e in events[5:]])  # past the filter's start-up transient
    assert np.all(np.abs(estimates / sigma - 1.0) < 0.05)
    # The default estimator (every 4th sample of each block) finds the same spikes and stays within 5
    # standard errors of the whole-block value in every block, the standard error computed for this very
    # spectrum: autocorrelation of 0.3 x white + 2 x differenced white, through the filter.
    default = detect_array(ThresholdDetector(release_sigma=1), x, fs, 65536)
    assert sum(np.min(np.abs(starts - e.start_index)) <= 8 for e in default) == len(starts)
    impulse = signal.sosfilt(signal.bessel(4, 25e3, fs=fs, norm="mag", output="sos"), np.r_[1.0, np.zeros(3000)])
    differenced = np.diff(np.r_[0.0, impulse])
    acf = (0.09 * np.correlate(impulse, impulse, "full") + 4 * np.correlate(differenced, differenced, "full"))
    acf = acf[len(impulse) - 1:len(impulse) + 399]
    se_sigma = _difference_standard_errors(acf / acf[0], 25_000, 4)[1]
    whole_block = {e.start_index // 25_000: e.noise_rms_A for e in events}
    strided = {e.start_index // 25_000: e.noise_rms_A for e in default}
    gaps = np.array([(strided[j] - whole_block[j]) / sigma for j in whole_block])
    assert len(gaps) == 20 and np.max(np.abs(gaps)) < 5 * se_sigma, (np.max(np.abs(gaps)), se_sigma)
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


def _hand_block_statistics(x, block, stride_of):
    """Block levels, centres, baseline line and quiet-side (anodic) noise of ``x``, written out with numpy.

    A plain restatement of the documented estimator (docs/detectors.md, "Baseline" and "Noise"): per block
    the median of the subsample ``x[a:b][::stride_of(b - a)]``, 1.4826 x MAD about it, the median again of
    the subsample within 3 of those sigmas; the line between block centres (the end segments extended);
    1.4826 x the median magnitude of the negative residuals of the same subsample. A tail of at least
    half a block is a block of its own (``len(x)`` is chosen so that it is).
    """
    bounds = [(a, min(a + block, len(x))) for a in range(0, len(x), block)]
    levels, centres = [], []
    for a, b in bounds:
        sub = x[a:b][::stride_of(b - a)]
        first = np.median(sub)
        spread = np.abs(sub - first)
        sigma = MAD_TO_SIGMA * np.median(spread)
        levels.append(np.median(sub[spread <= 3.0 * sigma]))
        centres.append(a + (b - a - 1) / 2.0)
    pos = np.arange(len(x), dtype=np.float64)
    line = np.interp(pos, centres, levels)
    for edge, (i, k) in (((pos < centres[0]), (0, 1)), ((pos > centres[-1]), (-2, -1))):
        slope = (levels[k] - levels[i]) / (centres[k] - centres[i])
        line[edge] = levels[i] + slope * (pos[edge] - centres[i])
    noise = []
    for a, b in bounds:
        sub = (x - line)[a:b][::stride_of(b - a)]
        noise.append(MAD_TO_SIGMA * np.median(-sub[sub < 0]))
    return line, np.array(noise)


def test_block_statistics_are_the_documented_estimator_on_every_s_th_sample():
    # 3 blocks of 1000 samples and a 600-sample tail (a block of its own), a pulse in each: each event
    # carries its block's noise and the baseline line at its start.
    fs, block = 100e3, 1000
    rng = np.random.default_rng(21)
    x = rng.normal(0.0, SIGMA, 3600) + 2 * SIGMA * np.linspace(0.0, 1.0, 3600)
    for start in (480, 1500, 2400, 3300):
        _pulse(x, start, 20, 12 * SIGMA)
    cases = {0: lambda n: 1,                          # every sample (the estimator before stat_samples)
             300: lambda n: -(-n // 300)}             # stride 4 in the full blocks, 2 in the tail
    found = {}
    for stat_samples, stride_of in cases.items():
        events = detect_array(ThresholdDetector(stat_samples=stat_samples, baseline_window="10 ms"), x, fs, 777)
        line, noise = _hand_block_statistics(x, block, stride_of)
        assert [(e.start_index + 50) // block for e in events] == [0, 1, 2, 3]
        for e in events:
            assert e.noise_rms_A == pytest.approx(noise[e.start_index // block], rel=1e-12, abs=0)
            assert e.baseline_A == pytest.approx(line[e.start_index], rel=0, abs=1e-9 * SIGMA)
        found[stat_samples] = signature(events)
    # The subsample changes the values (so the comparison above tells the two apart) ...
    assert [ev[3] for ev in found[0]] != [ev[3] for ev in found[300]]
    # ... and a subsample as long as the block is the block: the same events as stat_samples = 0, bit for bit.
    for stat_samples in (1000, 5000):
        events = detect_array(ThresholdDetector(stat_samples=stat_samples, baseline_window="10 ms"), x, fs, 777)
        assert signature(events) == found[0]


@pytest.mark.parametrize("stat_samples", [8192, 1000])
def test_strided_statistics_identical_whatever_the_chunking(stat_samples):
    # At 100 kHz a 100 ms block is 10,000 samples: stride 2 (default) or 10; the 5,500-sample tail is a block
    # with stride 1 or 6. Chunk borders never line up with the strided samples.
    x, fs = _busy_record()
    x = x[:295_500]
    detector = ThresholdDetector(stat_samples=stat_samples)
    reference = signature(detect_array(detector, x, fs, None, check_contract=True))
    assert len(reference) >= 12
    assert reference != signature(detect_array(ThresholdDetector(stat_samples=0), x, fs))
    for chunks in (4096, 10007, [1, 999, 17, 5000, 333]):
        assert signature(detect_array(detector, x, fs, chunks, check_contract=True)) == reference, chunks


# First-order standard error of (subsample estimate - whole-block estimate), from the influence functions.
# The sample median's Bahadur representation (Bahadur 1966, "A note on quantiles in large samples", Ann. Math.
# Statist. 37:577; from memory) makes it theta + mean(1/2 - 1{x < theta}) / f(theta); for independent normal
# samples that gives the asymptotic standard error sqrt(pi/2) sigma / sqrt(n) = 1.2533 sigma / sqrt(n)
# (Kendall & Stuart, The Advanced Theory of Statistics vol. 1, sampling distribution of quantiles; from
# memory). The quiet-side noise t solves mean(1{r < -t}) = mean(1{r < 0}) / 2 with r = x - level; expanding
# in t and the level (computed here) gives the influence (1.4826 / phi(t0)) (1{x < -t0} - beta 1{x < 0} + c),
# t0 = Phi^-1(3/4), beta = 1/2 + (phi(t0) - phi(0)/2) / phi(0): 1.789 sigma / sqrt(n) for independent samples
# (a Monte Carlo of the detector itself gave 1.73 to 1.83). For correlated (filtered) noise the covariance
# of two indicators at lag k is a bivariate-normal orthant probability of the correlation rho_k; the
# difference of two nested means with weights w has variance sum_k gamma(k) sum_i w_i w_{i+k}, gamma(k) the
# influence covariance at lag k (computed here).
_T0 = stats.norm.ppf(0.75)


def _lower_orthant(h, k, rho):
    """P(X < h, Y < k) for standard normals of correlation ``rho`` (array), by quadrature over X."""
    x = np.linspace(-9.0, h, 6001)[:, None]
    r = np.clip(rho, -0.999999, 0.999999)[None, :]
    dens = stats.norm.pdf(x) * stats.norm.cdf((k - r * x) / np.sqrt(1 - r * r))
    out = np.trapezoid(dens, x[:, 0], axis=0)
    out[rho >= 0.999999] = stats.norm.cdf(min(h, k))
    return out


def _difference_standard_errors(rho, n, stride):
    """Standard errors (in sigmas) of the level and noise-sigma differences, subsample minus whole block.

    ``rho``: noise autocorrelation at lags 0, 1, ... (negligible beyond); ``n``: block length in samples.
    """
    # P(X < 0, Y < 0) = 1/4 + arcsin(rho) / (2 pi) (Sheppard 1899, Phil. Trans. A 192:101; from memory):
    # checked against the quadrature, so the quadrature is right where it matters.
    assert np.allclose(_lower_orthant(0.0, 0.0, rho), 0.25 + np.arcsin(rho) / (2 * np.pi), atol=1e-7)
    phi0, phit = stats.norm.pdf(0.0), stats.norm.pdf(_T0)
    beta = 0.5 + (phit - phi0 / 2) / phi0
    c_bb = np.arcsin(rho) / (2 * np.pi)
    c_aa = _lower_orthant(-_T0, -_T0, rho) - 1 / 16
    c_ab = _lower_orthant(-_T0, 0.0, rho) - 1 / 8
    gamma_level = c_bb / phi0**2
    gamma_sigma = (MAD_TO_SIGMA / phit) ** 2 * (c_aa - 2 * beta * c_ab + beta**2 * c_bb)
    m = -(-n // stride)
    w = np.full(n, -1.0 / n)
    w[::stride] += 1.0 / m
    lag_sums = np.array([np.dot(w[:n - k], w[k:]) for k in range(len(rho))])
    twice = np.r_[1.0, np.full(len(rho) - 1, 2.0)]   # lags -k and +k
    return np.sqrt(np.sum(twice * gamma_level * lag_sums)), np.sqrt(np.sum(twice * gamma_sigma * lag_sums))


@pytest.mark.parametrize("cutoff_hz", [None, 15e3])
def test_strided_statistics_agree_with_the_whole_block_within_their_standard_error(cutoff_hz, monkeypatch):
    fs, block = 250e3, 25_000   # defaults: 100 ms blocks at 250 kHz, stat_samples 8192 -> stride 4
    stride = -(-block // 8192)
    impulse = np.r_[1.0, np.zeros(3000)]
    if cutoff_hz is not None:   # 4-pole Bessel low-pass, as the default pipeline applies
        sos = signal.bessel(4, cutoff_hz, fs=fs, norm="mag", output="sos")
        impulse = signal.sosfilt(sos, impulse)
    acf = np.correlate(impulse, impulse, "full")[len(impulse) - 1:]
    rho = acf[:400] / acf[0]
    assert abs(rho[-1]) < 1e-6
    se_level, se_sigma = _difference_standard_errors(rho, block, stride)
    if cutoff_hz is None:   # white noise: the nested-sample formula c sqrt(1/m - 1/n)
        assert se_level == pytest.approx(np.sqrt(np.pi / 2) * np.sqrt(1 / 6250 - 1 / block), rel=1e-6)

    seen: dict[int, dict[str, list]] = {}
    level, noise = ThresholdDetector._level, ThresholdDetector._noise

    def record_level(self, st, a, b):
        out = level(self, st, a, b)
        seen.setdefault(id(self), {"level": [], "sigma": []})["level"].append(out[0])
        return out

    def record_noise(self, residual):
        out = noise(self, residual)
        seen.setdefault(id(self), {"level": [], "sigma": []})["sigma"].append(out)
        return out

    monkeypatch.setattr(ThresholdDetector, "_level", record_level)
    monkeypatch.setattr(ThresholdDetector, "_noise", record_noise)
    differences = {"level": [], "sigma": []}
    for seed in range(4):
        rng = np.random.default_rng(100 + seed)
        x = SIGMA * signal.convolve(rng.normal(size=40 * block), impulse)[:40 * block] / np.sqrt(acf[0])
        whole, strided = ThresholdDetector(stat_samples=0), ThresholdDetector()
        detect_array(whole, x, fs, 1 << 16)
        detect_array(strided, x, fs, 1 << 16)
        for key in differences:
            differences[key] += list((np.array(seen[id(strided)][key]) - seen[id(whole)][key]) / SIGMA)
        seen.clear()
    for key, se in (("level", se_level), ("sigma", se_sigma)):
        d = np.array(differences[key])
        n_blocks = d.size   # blocks are nearly independent: the correlation time is < 0.1 % of a block
        # No block beyond 5 standard errors (probability 6e-7 per block for a normal difference) ...
        assert np.max(np.abs(d)) < 5 * se, (key, np.max(np.abs(d)), se)
        # ... no bias beyond 5 standard errors of a mean over the blocks ...
        assert abs(np.mean(d)) < 5 * se / np.sqrt(n_blocks), (key, np.mean(d), se)
        # ... and the spread is the predicted one: the rms of 160 differences has a relative standard error of
        # 1/sqrt(2 x 160) = 6 %, so 0.7-1.3 is 5 of them. Stride 1 would give 0, stride 8 about 1.5.
        assert 0.7 < np.sqrt(np.mean(d * d)) / se < 1.3, (key, np.sqrt(np.mean(d * d)), se)


def _run_sharing(variants, x, fs, memo, chunk=7000):
    """Signatures of the events of ``variants`` started with one ``memo`` and fed interleaved chunks."""
    states = [d.start_shared(fs, memo) for d in variants]
    shared: list[list] = [[] for _ in variants]
    for at in range(0, x.size, chunk):
        for i, d in enumerate(variants):
            events, states[i] = d.process(x[at:at + chunk], at, states[i])
            shared[i] += events
        # Entries are dropped once every sharer has read them: the memo stays small however long the stream.
        assert all(len(book.values) <= 4 for book in memo.values())
    for i, d in enumerate(variants):
        shared[i] += d.finish(states[i])
    return [signature(events) for events in shared]


def test_detectors_with_other_subsamples_never_share_block_statistics():
    # Memo entries are keyed by the subsample too: stride 2 (8192 at 10,000-sample blocks), 10 (1000) and 1
    # (0, and 20,000 which is longer than the block: one entry for the two). Each finds what it finds alone.
    x, fs = _busy_record()
    x = x[:295_500]   # a tail block too, with its own stride
    variants = [ThresholdDetector(), ThresholdDetector(stat_samples=1000), ThresholdDetector(stat_samples=0),
                ThresholdDetector(stat_samples=20_000, k_sigma=4)]
    alone = [signature(detect_array(d, x, fs, 7000)) for d in variants]
    assert len({tuple(a) for a in alone}) == 4
    memo: dict = {}
    assert _run_sharing(variants, x, fs, memo) == alone
    assert len(memo) == 3 * 3   # levels, residuals, noise for each of strides 2, 10 and 1


def test_stat_samples_must_not_be_negative():
    with pytest.raises(ParameterError, match="stat_samples.*expected an integer \\(>= 0\\), got -1"):
        ThresholdDetector(stat_samples=-1)


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
    assert _run_sharing(variants, x, fs, memo) == alone
    assert all(len(events) > 10 for events in alone)
    # Levels and residuals: one book each per window (100 ms, 30 ms); noise: one per window and polarity,
    # each block's noise computed once per book (30 blocks of 100 ms, 100 of 30 ms), not once per detector.
    assert len(memo) == 7
    assert len(noise_calls) == 30 + 30 + 100
