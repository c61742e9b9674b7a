"""Accuracy of the default pipeline on a short simulated recording: the figures of the accuracy benchmark
(``tests/benchmarks/bench_accuracy.py``) in small, so a change to a default or a stage cannot silently lose them.

Simulated at 100 kHz: spikes (5 s, ~70 events), bursts (4 s, ~55 events), event-free noise (4 s).
Matching and scores come from :mod:`impactline.compare` through the benchmark's helpers.
"""

from __future__ import annotations

import importlib.util
import math
import sys
from pathlib import Path

import numpy as np
import pytest

FS = 100e3
_BENCH = Path(__file__).resolve().parent / "benchmarks" / "bench_accuracy.py"


def _bench():
    name = "impactline_bench_accuracy"
    if name not in sys.modules:
        spec = importlib.util.spec_from_file_location(name, _BENCH)
        module = importlib.util.module_from_spec(spec)
        sys.modules[name] = module
        spec.loader.exec_module(module)
    return sys.modules[name]


@pytest.fixture(scope="module")
def scored(tmp_path_factory):
    bench = _bench()
    folder = tmp_path_factory.mktemp("accuracy")
    # 100 kHz is the hardest rate for the charge (the pipeline filter removes the least noise there). Median
    # true SNR 20 (spikes) and 15 (bursts), narrow size spreads: most events between SNR 8 and 40.
    recordings = [
        bench.write_recording("spike", bench.shape_spec("spike", FS, 5.0, 15.0, seed=11, target_snr=20.0, gsd=1.25),
                              folder),
        bench.write_recording("burst", bench.shape_spec("burst", FS, 4.0, 15.0, seed=12, target_snr=15.0, gsd=1.2),
                              folder),
    ]
    noise = bench.write_recording(bench.NOISE, bench.noise_spec(FS, 4.0, seed=11), folder)
    default = bench.variants()[0]
    rows = bench._concat([bench.match_rows(r, default.events(r)[0], "default") for r in recordings])
    return bench, rows, default.events(noise)[0].num_rows


def test_default_pipeline_f1_above_095_for_snr_8_and_more(scored):
    bench, rows, _ = scored
    assert np.sum(rows["true_snr"] >= 8) >= 80  # enough events for the figure to mean something
    score = bench.band_f1(rows, 8.0, math.inf)
    # Goal of the issue: F1 >= 0.95 for SNR >= 8. Measured 1.000 here; 0.968 with the former merge_gap of
    # 100 us (bursts cut in pieces), 0.939 with the former defaults (also release 1 sigma, 25 kHz cutoff).
    assert score["f1"] >= 0.95, score


def test_default_pipeline_charge_error_within_5_percent(scored):
    _, rows, _ = scored
    spikes = (rows["shape"] == "spike") & (rows["true_snr"] >= 10) & (rows["outcome"] == "matched")
    assert spikes.sum() >= 40
    median = float(np.median(rows["charge_rel_error"][spikes]))
    # Goal of the issue: median relative charge error <= 5 % for spikes of SNR >= 10. Measured -4.5 % here
    # (the end of the decaying tail below the noise is lost); -7.2 % with the former release at 1 sigma.
    assert abs(median) <= 0.05, median


def test_event_free_noise_gives_almost_no_event(scored):
    _, _, count = scored
    # Goal: < 1 false event per 10 s; 4 s of noise at the benchmark's 0.33 per 10 s (100 kHz) expects 0.13. Poisson
    # probability of 3 or more is 0.03 %, so 3 would mean the false-alarm rate has gone up.
    assert count <= 2
