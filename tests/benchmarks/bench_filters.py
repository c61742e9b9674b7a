"""Speed of each bundled filter against the plain scipy / PyWavelets call doing the same job in one go.

Run by hand (figures go in docs/filters.md)::

    python3 tests/benchmarks/bench_filters.py --samples 1e7
    python3 tests/benchmarks/bench_filters.py --spike      # the 10 us spike table of docs/filters.md
    python3 tests/benchmarks/bench_filters.py --test-signals   # MSE on the Donoho-Johnstone signals

or through pytest: ``python3 -m pytest -m benchmark tests/benchmarks/bench_filters.py -s``.

Ours streams the signal in chunks of 2^20 samples (the runner's default) through ``start``/``process``/
``finish`` (outputs passed on, as in the runner, not concatenated); the plain call gets the whole array at
once (``sosfiltfilt``, ``sosfilt``, ``pywt.swt``/``iswt``, ``ndimage.median_filter``). Samples per second
are wall-clock, best of ``repeat``.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pytest
import pywt
from impactline.bandwidth import rise_time_10_90, run_filters
from impactline_plugins.filters import Baseline, Bessel, Mains, Wavelet
from impactline_plugins.filters.wavelet import mad_sigma, universal_threshold
from scipy import ndimage, signal

FS = 250e3
CHUNK = 1 << 20


def _plain_swt(x: np.ndarray, stage: Wavelet) -> np.ndarray:
    step = 2**stage.level
    x = x[: len(x) // step * step]
    coeffs = pywt.swt(x, stage.wavelet, level=stage.level, trim_approx=True, norm=True)
    shrunk = [coeffs[0]] + [pywt.threshold(d, universal_threshold(len(x), mad_sigma(d)), stage.thresholding)
                            for d in coeffs[1:]]
    return pywt.iswt(shrunk, stage.wavelet, norm=True)


def _cases():
    bessel_zp = Bessel(order=4, cutoff="25 kHz")
    bessel_c = Bessel(order=4, cutoff="25 kHz", mode="causal")
    mains_c = Mains()
    mains_zp = Mains(mode="zero-phase")
    wavelet = Wavelet()
    baseline = Baseline(window="0.2 s")
    size = baseline.window_samples(FS)
    return [
        ("bessel zero-phase", bessel_zp, lambda x: signal.sosfiltfilt(bessel_zp.design(FS).sos, x),
         "sosfiltfilt"),
        ("bessel causal", bessel_c, lambda x: signal.sosfilt(bessel_c.design(FS).sos, x), "sosfilt"),
        ("mains causal", mains_c, lambda x: signal.sosfilt(mains_c.design(FS).sos, x), "sosfilt"),
        ("mains zero-phase", mains_zp, lambda x: signal.sosfiltfilt(mains_zp.design(FS).sos, x),
         "sosfiltfilt"),
        ("wavelet swt sym4 L5", wavelet, lambda x: _plain_swt(x, wavelet), "pywt swt+iswt"),
        ("baseline median 0.2 s", baseline, lambda x: ndimage.median_filter(x, size=size, mode="reflect"),
         "ndimage.median_filter"),
    ]


def _best_pair(first, second, repeat: int) -> tuple[float, float]:
    """Best wall-clock time of two callables, timed alternately (a shared machine's load hits both)."""
    times: tuple[list[float], list[float]] = ([], [])
    for _ in range(repeat):
        for fn, record in ((first, times[0]), (second, times[1])):
            t0 = time.perf_counter()
            fn()
            record.append(time.perf_counter() - t0)
    return min(times[0]), min(times[1])


def _stream(stage, x: np.ndarray) -> int:
    """Stream ``x`` through ``stage`` in runner-sized chunks; outputs are passed on, not collected."""
    state = stage.start(FS)
    emitted = 0
    for lo in range(0, x.size, CHUNK):
        y, state = stage.process(x[lo:lo + CHUNK], state)
        emitted += y.size
    emitted += stage.finish(state).size
    assert emitted == x.size
    return emitted


def measure_speed(n_samples: int = 10_000_000, repeat: int = 5) -> list[tuple[str, float, float, str]]:
    """Return (filter, our samples/s, plain samples/s, plain call) for each case."""
    rng = np.random.default_rng(0)
    x = 1e-9 + 1e-12 * rng.standard_normal(n_samples)
    rows = []
    for name, stage, plain, plain_name in _cases():
        stage.start(FS)  # designs are cached per sample rate, as after the first file of a run
        ours, reference = _best_pair(lambda s=stage: _stream(s, x), lambda p=plain: p(x), repeat)
        rows.append((name, n_samples / ours, n_samples / reference, plain_name))
    return rows


def _fwhm(y: np.ndarray, fs: float) -> float:
    """Full width at half maximum, s, with linear interpolation of both crossings."""
    peak = int(np.argmax(y))
    half = y[peak] / 2
    left = peak - int(np.argmax(y[peak::-1] < half))
    right = peak + int(np.argmax(y[peak:] < half))
    t_left = left + (half - y[left]) / (y[left + 1] - y[left])
    t_right = right - 1 + (y[right - 1] - half) / (y[right - 1] - y[right])
    return (t_right - t_left) / fs


def spike_effect(replicates: int = 100) -> list[tuple[str, float, float, float, float]]:
    """Effect on a 10 us rectangular spike of 10 sigma at 1 MHz, ensemble of noisy replicates.

    Returns (filter, peak kept = max of the mean output / true height, FWHM of the mean output (s),
    10-90 % rise time of its leading edge (s), output noise rms / input noise rms).
    """
    fs, n, width, amplitude = 1e6, 16_384, 10, 10.0
    centre = n // 2
    truth = np.zeros(n)
    truth[centre:centre + width] = amplitude
    rng = np.random.default_rng(1)
    noises = [rng.standard_normal(n) for _ in range(replicates)]
    block = n / fs
    stages = [
        ("bessel zero-phase 20 kHz", Bessel(cutoff=20e3)),
        ("bessel zero-phase 35 kHz", Bessel(cutoff=35e3)),
        ("bessel zero-phase 50 kHz", Bessel(cutoff=50e3)),
        ("bessel zero-phase 100 kHz", Bessel(cutoff=100e3)),
        ("wavelet sym4 L5 universal hard", Wavelet(block=block)),
        ("wavelet sym4 L5 universal soft", Wavelet(thresholding="soft", block=block)),
        ("wavelet sym4 L5 sure hard", Wavelet(threshold="sure", block=block)),
        ("wavelet sym4 L5 bayes hard", Wavelet(threshold="bayes", block=block)),
        ("wavelet sym4 L5 bayes soft", Wavelet(threshold="bayes", thresholding="soft", block=block)),
        ("wavelet haar L5 universal hard", Wavelet(wavelet="haar", block=block)),
        ("wavelet db4 L5 universal hard, discrete",
         Wavelet(wavelet="db4", transform="discrete", block=block)),
    ]
    rows = []
    for name, stage in stages:
        out = np.array([run_filters([stage], truth + z, fs) for z in noises])
        mean = out.mean(axis=0)
        window = mean[centre - 300:centre + 300]
        leading = window[: int(np.argmax(window)) + 1]
        rise = rise_time_10_90(np.concatenate([[0.0], leading]), fs)
        noise = float(np.std(out[:, :centre - 2000]))
        rows.append((name, float(window.max() / amplitude), _fwhm(window, fs), rise, noise))
    return rows


def dj_signal_risks(n: int = 2048, replicates: int = 20) -> dict[str, dict[str, float]]:
    """Mean squared error (sigma = 1) on the Donoho-Johnstone test signals at SNR 7, per threshold rule.

    Discrete transform, sym8, 5 levels, soft thresholding, noise from the finest level, one block.
    """
    rng = np.random.default_rng(5)
    table = {}
    for name in ("Blocks", "Bumps", "HeaviSine", "Doppler"):
        f = pywt.data.demo_signal(name, n)
        f = 7.0 * f / np.std(f)
        noisy = [f + rng.standard_normal(n) for _ in range(replicates)]
        table[name] = {}
        for rule in ("universal", "sure", "bayes"):
            stage = Wavelet(wavelet="sym8", level=5, transform="discrete", threshold=rule,
                            thresholding="soft", noise="finest", block=1.0)
            table[name][rule] = float(np.mean([np.mean((run_filters([stage], y, float(n)) - f) ** 2)
                                               for y in noisy]))
    return table


def _print_speed(rows) -> None:
    header = f"{'ours (Msamples/s)':>18s} {'plain (Msamples/s)':>19s} {'ours/plain':>10s}"
    print(f"{'filter':26s} {header}  plain call")
    for name, ours, plain, plain_name in rows:
        print(f"{name:26s} {ours / 1e6:18.2f} {plain / 1e6:19.2f} {ours / plain:10.2f}  {plain_name}")


def _print_spike(rows) -> None:
    print(f"{'filter':42s} {'peak kept':>9s} {'FWHM us':>8s} {'rise us':>8s} {'noise rms':>9s}")
    for name, peak, fwhm, rise, noise in rows:
        print(f"{name:42s} {peak:9.3f} {fwhm * 1e6:8.2f} {rise * 1e6:8.2f} {noise:9.3f}")


@pytest.mark.benchmark
def test_filter_speed():
    rows = measure_speed(2_000_000, repeat=1)
    _print_speed(rows)
    assert all(ours > 0 for _, ours, _, _ in rows)


@pytest.mark.benchmark
def test_spike_effect():
    rows = spike_effect(20)
    _print_spike(rows)
    assert all(0 < peak < 1.5 for _, peak, _, _, _ in rows)


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=float, default=1e7)
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--spike", action="store_true", help="print the 10 us spike table instead")
    parser.add_argument("--replicates", type=int, default=100)
    parser.add_argument("--test-signals", action="store_true", help="print the test-signal MSE table instead")
    args = parser.parse_args()
    if args.test_signals:
        for signal_name, risks in dj_signal_risks().items():
            print(f"{signal_name:10s} " + "  ".join(f"{rule} {mse:.3f}" for rule, mse in risks.items()))
    elif args.spike:
        _print_spike(spike_effect(args.replicates))
    else:
        _print_speed(measure_speed(int(args.samples), args.repeat))
