"""Speed of the bundled detectors, in samples per second, on a 10^7-sample record.

Run by hand (figures go in docs/detectors.md)::

    python3 tests/benchmarks/bench_detectors.py --samples 1e7

or through pytest: ``python3 -m pytest -m benchmark tests/benchmarks/bench_detectors.py -s``.

Two records at 250 kHz, 1 pA rms white noise: 50 collision spikes per second (each gives the CUSUM two
changes), or a 4-sigma step every 0.2 s. They are streamed through ``start``/``process``/``finish`` in
chunks of 2^20 samples (the runner's default). For scale, the last row is Page's recursion written as a
plain Python loop per sample (on 2e5 samples): the speed a per-sample loop would give. Wall-clock, best
of ``repeat``.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pytest
from impactline_plugins.detectors import CusumDetector, ThresholdDetector

FS = 250e3
CHUNK = 1 << 20


def make_record(n_samples: int, kind: str, seed: int = 0) -> np.ndarray:
    """1 pA white noise plus 50 exponential spikes per second (``"spikes"``) or a 4-sigma step every
    0.2 s (``"steps"``), A."""
    rng = np.random.default_rng(seed)
    x = 1e-12 * rng.standard_normal(n_samples)
    if kind == "spikes":
        spike = 12e-12 * np.exp(-np.arange(250) / 50.0)
        for start in rng.integers(0, n_samples - 250, int(n_samples / FS * 50)):
            x[start:start + 250] += spike
    else:
        for k, start in enumerate(range(int(0.13 * FS), n_samples, int(0.2 * FS))):
            x[start:] += 4e-12 if k % 2 == 0 else -4e-12
    return x


def _stream(detector, x: np.ndarray) -> int:
    state = detector.start(FS)
    count = 0
    for lo in range(0, x.size, CHUNK):
        events, state = detector.process(x[lo:lo + CHUNK], lo, state)
        count += len(events)
    return count + len(detector.finish(state))


def _page_loop(z: np.ndarray, k: float = 0.5, h: float = 15.0) -> int:
    cp = cm = 0.0
    alarms = 0
    for value in z.tolist():
        cp = max(0.0, cp + value - k)
        cm = max(0.0, cm - value - k)
        if cp > h or cm > h:
            alarms += 1
            cp = cm = 0.0
    return alarms


def measure_speed(n_samples: int = 10_000_000, repeat: int = 3) -> list[tuple[str, float, int]]:
    """Return (case, samples/s, events found) for each detector setting."""
    spikes, steps = make_record(n_samples, "spikes"), make_record(n_samples, "steps")
    cases = [
        ("threshold (defaults), spikes", ThresholdDetector(), spikes),
        ("threshold both, spikes", ThresholdDetector(polarity="both"), spikes),
        ("cusum (defaults), steps", CusumDetector(), steps),
        ("cusum group=200 us, steps", CusumDetector(group="200 us"), steps),
        ("cusum (defaults), spikes", CusumDetector(), spikes),
    ]
    rows = []
    for name, detector, x in cases:
        best, found = np.inf, 0
        for _ in range(repeat):
            t0 = time.perf_counter()
            found = _stream(detector, x)
            best = min(best, time.perf_counter() - t0)
        rows.append((name, n_samples / best, found))
    z = np.random.default_rng(1).standard_normal(200_000)
    t0 = time.perf_counter()
    _page_loop(z)
    rows.append(("Page loop in plain Python", z.size / (time.perf_counter() - t0), 0))
    return rows


def _print(rows) -> None:
    print(f"{'detector, record':30s} {'Msamples/s':>11s} {'events':>8s}")
    for name, speed, found in rows:
        print(f"{name:30s} {speed / 1e6:11.2f} {found:8d}")


@pytest.mark.benchmark
def test_detector_speed():
    rows = measure_speed(10_000_000, repeat=1)
    _print(rows)
    assert all(speed > 0 for _, speed, _ in rows)


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=float, default=1e7)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    _print(measure_speed(int(args.samples), args.repeat))
