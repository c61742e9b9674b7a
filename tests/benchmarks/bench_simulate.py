"""Speed and memory of the simulator writing a long recording.

Run by hand::

    python3 tests/benchmarks/bench_simulate.py --samples 1e8

or through pytest (2e7 samples): ``python3 -m pytest -m benchmark tests/benchmarks/bench_simulate.py -s``.

Writes a float32 recording with every noise source, hum, wander and 10 collisions per second, and prints
samples per second and the growth of the resident memory. The memory must stay far below the size of the
whole signal (the simulator works block by block).
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import psutil
import pytest
from impactline.simulate import SimulationSpec, simulate

FS = 250e3
#: The growth of resident memory allowed, bytes (a 2e7-sample float64 signal alone would be 160 MB).
MEMORY_GOAL = 80e6


def measure(n_samples: int, folder: Path) -> dict[str, float]:
    spec = SimulationSpec(sample_rate_hz=FS, duration_s=n_samples / FS, collision_rate_per_s=10.0,
                          hum_amplitude_A=2e-12, wander_rms_A=1e-12, drift_A_per_s=1e-13, seed=1)
    process = psutil.Process()
    before = process.memory_info().rss
    peak = before
    started = time.perf_counter()

    def watch(done: int, total: int) -> None:
        nonlocal peak
        peak = max(peak, process.memory_info().rss)

    result = simulate(spec, folder / "bench.bin", progress=watch, overwrite=True)
    seconds = time.perf_counter() - started
    return {"samples": result.n_samples, "seconds": seconds, "samples_per_s": result.n_samples / seconds,
            "memory_growth_bytes": peak - before, "events": result.n_events}


def _report(row: dict[str, float]) -> str:
    return (f"{row['samples']:.3g} samples in {row['seconds']:.1f} s: {row['samples_per_s'] / 1e6:.2f} M samples/s, "
            f"resident memory +{row['memory_growth_bytes'] / 1e6:.1f} MB, {row['events']} events")


@pytest.mark.benchmark
def test_simulator_memory_stays_bounded(tmp_path):
    row = measure(int(2e7), tmp_path)
    print("\n" + _report(row))
    assert row["memory_growth_bytes"] < MEMORY_GOAL


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=float, default=2e7)
    arguments = parser.parse_args()
    with tempfile.TemporaryDirectory() as folder:
        print(_report(measure(int(arguments.samples), Path(folder))))
