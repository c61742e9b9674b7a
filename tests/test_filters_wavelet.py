"""Wavelet denoising: threshold rules against their published definitions, streaming, test signals."""

import math

import numpy as np
import pytest
import pywt
from impactline import ParameterError
from impactline.bandwidth import run_filters
from impactline_plugins.filters import Bessel, Wavelet
from impactline_plugins.filters.wavelet import (
    NORMAL_MAD,
    apply_threshold,
    bayes_threshold,
    mad_sigma,
    sure_risk,
    sure_threshold,
    universal_threshold,
    wavelet_margin,
)
from scipy import stats


# ------------------------------------------------------------------------------- threshold rules
def test_universal_threshold_constants():
    # sigma sqrt(2 ln n): Donoho & Johnstone (1994), Biometrika 81:425-455; values from REFERENCES.md.
    assert universal_threshold(1024) == pytest.approx(3.7233, abs=5e-5)
    assert universal_threshold(2048) == pytest.approx(3.9050, abs=5e-5)
    assert universal_threshold(4096) == pytest.approx(4.0787, abs=5e-5)
    assert universal_threshold(4096, sigma=2.5) == pytest.approx(2.5 * 4.0787, abs=2e-4)


def test_mad_constant_and_noise_estimate():
    # median(|d|)/0.6744898 (= 1.4826 MAD): Donoho & Johnstone (1994). 0.6744898 is the 75 % point of N(0,1).
    assert NORMAL_MAD == pytest.approx(stats.norm.ppf(0.75), rel=1e-15)
    assert 1 / NORMAL_MAD == pytest.approx(1.4826, abs=1e-4)
    d = np.array([-3.0, 0.2, NORMAL_MAD, -NORMAL_MAD, 9.0])  # median |d| = 0.6744898 -> sigma = 1
    assert mad_sigma(d) == pytest.approx(1.0, rel=1e-15)
    noise = 2.0 * np.random.default_rng(11).standard_normal(200_000)
    assert mad_sigma(noise) == pytest.approx(2.0, rel=0.01)
    # 2 % of large outliers (events) move it only by the shift of the median: P(|Z| < m) = 0.5 / 0.98
    # for the remaining 98 % (computed), +2.3 %, while the standard deviation triples.
    noise[::50] += 40.0
    expected = 2.0 * stats.norm.ppf(0.5 + 0.25 / 0.98) / NORMAL_MAD
    assert mad_sigma(noise) == pytest.approx(expected, rel=0.01)
    assert np.std(noise) > 2.5 * 2.0


def test_sure_worked_example_and_minimiser():
    # SURE(t) = d - 2 #{|x_i| <= t} + sum min(|x_i|, t)^2; x = [0.5, -1, 2, 3], t = 1 -> 3.25.
    # Donoho & Johnstone (1995), JASA 90:1200-1224; worked value from REFERENCES.md.
    x = np.array([0.5, -1.0, 2.0, 3.0])
    assert sure_risk(x, 1.0) == pytest.approx(3.25, abs=1e-15)
    # The minimiser searched over {0, |x_i|} up to sqrt(2 ln d) equals a brute-force search of SURE.
    rng = np.random.default_rng(2)
    dense = np.concatenate([rng.standard_normal(400), rng.normal(0, 4, 200)])
    limit = math.sqrt(2 * math.log(dense.size))
    candidates = np.concatenate([[0.0], np.abs(dense)[np.abs(dense) <= limit]])
    brute = candidates[np.argmin([sure_risk(dense, t) for t in candidates])]
    assert sure_threshold(dense) == pytest.approx(brute, rel=1e-12)
    assert 0 < sure_threshold(dense) < limit


def test_sure_hybrid_falls_back_to_universal_on_sparse_levels():
    # Hybrid rule: (sum x^2 - d)/d <= (log2 d)^1.5 / sqrt(d) -> universal threshold (Donoho & Johnstone 1995).
    rng = np.random.default_rng(3)
    sparse = rng.standard_normal(1024)
    sparse[:3] += 8.0
    d = sparse.size
    assert (np.sum(sparse**2) - d) / d <= math.log2(d) ** 1.5 / math.sqrt(d)
    assert sure_threshold(sparse) == pytest.approx(math.sqrt(2 * math.log(d)), rel=1e-15)
    assert sure_threshold(sparse, hybrid=False) < math.sqrt(2 * math.log(d))


def test_bayes_shrink_formula():
    # T = sigma^2 / sigma_x, sigma_x = sqrt(max(var_y - sigma^2, 0)); T = max|y| if sigma_x = 0.
    # Chang, Yu & Vetterli (2000), IEEE Trans. Image Processing 9:1532-1546.
    y = np.array([3.0, -3.0, 1.0, -1.0])  # mean of y^2 = 5
    assert bayes_threshold(y, 1.0) == pytest.approx(1.0 / 2.0)  # sigma_x = 2
    assert bayes_threshold(y, 2.0) == pytest.approx(4.0)  # sigma_x = 1
    assert bayes_threshold(y, 3.0) == 3.0  # sigma_x = 0 -> max|y|


def test_soft_and_hard_thresholding_match_pywavelets():
    d = np.random.default_rng(4).normal(0, 3, 1000)
    np.testing.assert_array_equal(apply_threshold(d, 2.0, "hard"), pywt.threshold(d, 2.0, mode="hard"))
    # pywt computes soft thresholding as d (1 - t/|d|): equal up to rounding.
    np.testing.assert_allclose(apply_threshold(d, 2.0, "soft"), pywt.threshold(d, 2.0, mode="soft"),
                               rtol=1e-14, atol=1e-15)


@pytest.mark.parametrize("name", ["HeaviSine", "Doppler"])
def test_oracle_inequality_monte_carlo(name):
    # E||theta_hat - theta||^2 <= (2 ln n + 1)(sigma^2 + sum min(theta_i^2, sigma^2)) for soft thresholding
    # at sigma sqrt(2 ln n) (Donoho & Johnstone 1994, oracle inequality). theta: orthonormal wavelet
    # coefficients of a test signal at SNR 7, sigma = 1; Monte Carlo mean over 50 replicates.
    n = 1024
    f = pywt.data.demo_signal(name, n)
    f = 7.0 * f / np.std(f)
    theta = np.concatenate(pywt.wavedec(f, "sym8", mode="periodization"))
    rng = np.random.default_rng(5)
    losses, raw = [], []
    for _ in range(50):
        y = theta + rng.standard_normal(n)
        losses.append(np.sum((apply_threshold(y, universal_threshold(n), "soft") - theta) ** 2))
        raw.append(np.sum((y - theta) ** 2))
    bound = (2 * math.log(n) + 1) * (1.0 + np.sum(np.minimum(theta**2, 1.0)))
    assert np.mean(losses) < bound
    if name == "HeaviSine":
        # The bound is tight enough here that leaving the data untouched (loss ~ n) would break it.
        assert np.mean(raw) > bound


# ------------------------------------------------------------------------------- the filter
def _noisy(n=40_000, seed=6):
    rng = np.random.default_rng(seed)
    x = 2e-9 + 4e-12 * rng.standard_normal(n)
    for start in (3_000, 17_000, 33_333):
        x[start:start + 30] += 50e-12 * np.exp(-np.arange(30) / 8.0)
    return x


@pytest.mark.parametrize("transform", ["stationary", "discrete"])
@pytest.mark.parametrize("threshold", ["universal", "sure", "bayes"])
def test_chunked_equals_whole_exactly(transform, threshold):
    fs = 100e3
    x = _noisy()
    stage = Wavelet(transform=transform, threshold=threshold, block="41 ms", level=4)
    whole = run_filters([stage], x, fs)
    assert whole.shape == x.shape
    # Blocks sit at absolute positions and thresholds come from each block's own coefficients, so
    # chunking changes no operation at all: bitwise equal.
    for chunk in (100, 4096, 10_007, len(x) - 3):
        np.testing.assert_array_equal(run_filters([stage], x, fs, chunk_samples=chunk), whole)


@pytest.mark.parametrize("transform", ["stationary", "discrete"])
@pytest.mark.parametrize("thresholding", ["soft", "hard"])
def test_interior_block_equals_global_pywavelets_transform(transform, thresholding):
    # Reference: PyWavelets transform of the whole signal, thresholded with the universal rule using the
    # MAD noise of the middle block's own coefficients, then inverted. Our block (with its margins) must
    # give the same samples: the margin covers the reach of the analysis and synthesis filters.
    wavelet, level, block = "sym4", 3, 2048
    fs = 1.0 * block  # block = "1 s" is 2048 samples
    x = np.random.default_rng(7).standard_normal(3 * block)
    x[3000:3010] += 9.0
    stage = Wavelet(wavelet=wavelet, level=level, transform=transform, threshold="universal",
                    thresholding=thresholding, block=1.0)
    ours = run_filters([stage], x, fs)[block:2 * block]
    if transform == "stationary":
        coeffs = pywt.swt(x, wavelet, level=level, trim_approx=True, norm=True)
        own = [d[block:2 * block] for d in coeffs[1:]]
    else:
        coeffs = pywt.wavedec(x, wavelet, mode="periodization", level=level)
        own = [d[block // 2**(level - i):2 * block // 2**(level - i)] for i, d in enumerate(coeffs[1:])]
    limits = [universal_threshold(block, mad_sigma(d)) for d in own]
    shrunk = [coeffs[0]] + [pywt.threshold(d, t, mode=thresholding)
                            for d, t in zip(coeffs[1:], limits, strict=True)]
    if transform == "stationary":
        reference = pywt.iswt(shrunk, wavelet, norm=True)[block:2 * block]
    else:
        reference = pywt.waverec(shrunk, wavelet, mode="periodization")[block:2 * block]
    np.testing.assert_allclose(ours, reference, rtol=0, atol=1e-12)


def test_margin_from_filter_length_and_level():
    # 2 (2^J - 1)(L - 1) rounded up to a multiple of 2^J: sym4 (L = 8), J = 5 -> 434 -> 448.
    assert wavelet_margin("sym4", 5) == 448
    assert wavelet_margin("haar", 3) == 16
    assert wavelet_margin("db8", 4) % 16 == 0


@pytest.mark.parametrize("name", ["Blocks", "Bumps", "HeaviSine", "Doppler"])
def test_donoho_johnstone_test_signals(name):
    # Test signals of Donoho & Johnstone (1994), as shipped by PyWavelets, rescaled to SNR
    # sd(f)/sigma = 7 (REFERENCES.md). Noisy MSE is sigma^2 = 1.
    n = 2048
    f = pywt.data.demo_signal(name, n)
    f = 7.0 * f / np.std(f)
    rng = np.random.default_rng(8)
    mse = {rule: [] for rule in ("universal", "sure", "bayes")}
    direct = []
    for _ in range(6):
        y = f + rng.standard_normal(n)
        for rule in mse:
            stage = Wavelet(wavelet="sym8", level=5, transform="discrete", threshold=rule,
                            thresholding="soft", noise="finest", block=1.0)
            mse[rule].append(np.mean((run_filters([stage], y, float(n)) - f) ** 2))
        # VisuShrink written directly with PyWavelets on the whole signal (general-purpose reference).
        coeffs = pywt.wavedec(y, "sym8", mode="periodization", level=5)
        t = universal_threshold(n, mad_sigma(coeffs[-1]))
        coeffs = [coeffs[0]] + [pywt.threshold(d, t, mode="soft") for d in coeffs[1:]]
        direct.append(np.mean((pywt.waverec(coeffs, "sym8", mode="periodization") - f) ** 2))
    means = {rule: float(np.mean(v)) for rule, v in mse.items()}
    # Our block-wise VisuShrink agrees with the direct one (ends are mirrored rather than wrapped).
    assert means["universal"] == pytest.approx(np.mean(direct), rel=0.1)
    # SureShrink and BayesShrink adapt per level and do at least as well as VisuShrink, and much better
    # than the noisy data (Donoho & Johnstone 1995 report the same ordering on these signals).
    assert means["sure"] <= 1.02 * means["universal"]
    assert means["sure"] < 0.5 and means["bayes"] < 0.5


def test_ten_microsecond_spike_is_kept_better_than_by_a_bessel_filter_of_equal_noise():
    # A 10 us rectangular spike of 10 sigma at 1 MHz. Hard universal thresholding keeps its height and
    # edges; a zero-phase Bessel filter that leaves the same output noise flattens it.
    fs, n, width, amplitude = 1e6, 16_384, 10, 10.0
    centre = n // 2
    truth = np.zeros(n)
    truth[centre:centre + width] = amplitude
    rng = np.random.default_rng(9)
    noises = [rng.standard_normal(n) for _ in range(8)]
    wavelet = Wavelet(wavelet="sym4", level=5, threshold="universal", thresholding="hard", block=n / fs)
    out = np.array([run_filters([wavelet], truth + z, fs) for z in noises])
    noise_out = float(np.std(out[:, :centre - 2000]))
    kept = out.mean(axis=0)[centre - 20:centre + 30].max() / amplitude
    # The Bessel cutoff that gives the same output noise (white noise: rms ~ sqrt(noise bandwidth)).
    cutoffs = np.geomspace(5e3, 200e3, 12)
    rms = [np.std(run_filters([Bessel(cutoff=c)], noises[0], fs)[1000:-1000]) for c in cutoffs]
    matched = float(np.interp(noise_out, rms, cutoffs))
    bessel = Bessel(cutoff=matched)
    kept_bessel = np.mean([run_filters([bessel], truth + z, fs) for z in noises], axis=0).max() / amplitude
    assert noise_out < 0.3
    assert kept > 0.95
    assert kept_bessel < 0.8 * kept


def test_baseline_level_is_kept():
    fs = 100e3
    x = _noisy()
    y = run_filters([Wavelet()], x, fs)
    assert np.median(y) == pytest.approx(np.median(x), abs=0.05 * 4e-12)
    assert np.std(y[20_000:30_000]) < 0.4 * np.std(x[20_000:30_000])


def test_bad_wavelet_name_and_short_block():
    with pytest.raises(ParameterError, match="did you mean 'sym4'"):
        Wavelet(wavelet="sym04")
    with pytest.raises(ParameterError) as excinfo:
        Wavelet(level=6, block="5 ms").start(10e3)
    message = str(excinfo.value)
    assert "block" in message and "10 kHz" in message and "use block >= 102.4 ms" in message
    info = Wavelet().info(100e3)
    assert info.cutoff_hz is None and info.delay_s == 0.0
    assert Wavelet().frequency_response(np.array([0.0]), 100e3) is None
