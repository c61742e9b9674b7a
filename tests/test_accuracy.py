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


# ------------------------------------------------------------------------------------------ onset (half height)
def _edge_onset(current: np.ndarray, fs: float, mode: str = "zero-phase", timing: bool = True) -> float:
    """Onset (fractional sample) that the runner gives a noise-free current through a 15 kHz Bessel."""
    from impactline.bandwidth import PulseTiming, cascade_info, run_filters
    from impactline.runner import _onset_offset
    from impactline_plugins.filters import Bessel

    bessel = Bessel(order=4, cutoff=15e3, mode=mode)
    y = run_filters([bessel], current, fs)
    start = int(np.flatnonzero(y > 0.02 * y.max())[0])
    table = PulseTiming.from_filters([bessel], fs) if timing else None
    delay = cascade_info([bessel], fs).delay_s * fs   # the runner removes it from every time
    return start + _onset_offset(y[start:], 1e-3 * y.max(), fs, table) - delay


def _sampled_pulse(n: int, start: float, tau: float, width: float = math.inf) -> np.ndarray:
    """Sample averages (each over its index +- 0.5) of exp(-(t - start) / tau) on [start, start + width)."""
    k = np.arange(n, dtype=float)
    lo = np.clip(k - 0.5 - start, 0.0, width)
    hi = np.clip(k + 0.5 - start, 0.0, width)
    return hi - lo if math.isinf(tau) else tau * (np.exp(-lo / tau) - np.exp(-hi / tau))


@pytest.mark.parametrize("mode", ["zero-phase", "causal"])
@pytest.mark.parametrize(("tau", "width"), [(math.inf, 2.0), (math.inf, 6.0), (math.inf, 20.0), (4.0, math.inf),
                                            (20.0, math.inf), (50.0, math.inf), (500.0, math.inf)])
def test_onset_of_rectangles_and_exponential_decays_is_their_start(mode, tau, width):
    # The two families PulseTiming tabulates, at 1 MHz through a 15 kHz Bessel (rise time 23 samples): each pulse
    # rises at 999.5; noise-free, the onset comes back to a tenth of a sample, where the half-height crossing of
    # the filtered pulse alone is 0.35-11 samples early (the more so the shorter the pulse).
    fs = 1e6
    current = _sampled_pulse(8000, 999.5, tau, width)
    assert abs(_edge_onset(current, fs, mode) - 999.5) <= 0.1
    assert _edge_onset(current, fs, mode, timing=False) - 999.5 < -0.3


def test_onset_of_a_truncated_exponential_falls_between_the_families():
    # Neither family: an exponential of 50 samples cut after 40 (asymmetry between the two). Measured: -1.7
    # samples (the crossing alone: -2.4); the blend by asymmetry is a model, exact only at the two families.
    error = _edge_onset(_sampled_pulse(8000, 999.5, 50.0, 40.0), 1e6) - 999.5
    assert -2.0 <= error <= -1.0


def test_onset_of_a_short_pulse_is_its_start_not_its_smeared_edge():
    fs = 1e6
    current = np.zeros(4000)
    current[1000:1004] = 1.0   # a 4 us rectangle (the simulator's median blip) from sample 999.5 on
    # Half height of the 15 kHz-filtered blip is ~9 samples before the pulse; the chain's own pulse table takes
    # it back to the pulse start.
    assert abs(_edge_onset(current, fs) - 999.5) <= 0.1


def test_onset_of_a_burst_is_its_first_sub_spike():
    fs = 1e6
    t = np.arange(6000.0)
    current = np.zeros_like(t)
    for onset, height in ((1000, 1.0), (1150, 3.0)):   # a small sub-spike, then one three times higher
        current += height * np.where(t >= onset, np.exp(-(t - onset) / 50.0), 0.0)
    # Half of the largest peak is reached only on the second sub-spike, 150 samples late; the first peak of the
    # leading edge gives the first sub-spike, whose current jumps at 999.5 (sampled at the sample centres, so
    # within a few hundredths of a sample of a sample-averaged jump there). The filtered sub-spike crosses half
    # its lowered peak 2.4 samples early; its tail asymmetry identifies an exponential decay and takes that back.
    assert abs(_edge_onset(current, fs) - 999.5) <= 0.1
    assert abs(_edge_onset(current, fs, "causal") - 999.5) <= 0.1
