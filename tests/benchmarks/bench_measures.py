"""Per-event cost of the bundled feature extractors.

Run by hand: ``pytest -m benchmark -s tests/benchmarks/bench_measures.py``. Prints events per second of
each extractor on a mix of synthetic events (Bessel-filtered spikes with exponential decay, filtered
rectangles, three-spike bursts) with 2 ms of context each side at 100 kHz.
"""

from __future__ import annotations

import time

import numpy as np
import pytest
from impactline import Event, EventWindow, FilterInfo
from impactline_plugins.measures import BandwidthLimit, BaselineContext, PulseShape
from scipy import signal

FS = 100e3
FC = 10e3
NOISE = 2e-12
N_EVENTS = 1500
#: Goals in events per CPU-second on one core of a small machine; a regression below them fails.
GOAL_EVENTS_PER_S = {"baseline-context": 2000.0, "pulse-shape": 500.0, "bandwidth-limit": 2000.0}


def _windows(n: int, seed: int = 0) -> list[EventWindow]:
    rng = np.random.default_rng(seed)
    sos = signal.bessel(4, FC, fs=FS, norm="mag", output="sos")
    info = FilterInfo(cutoff_hz=FC, rise_time_s=0.3501 / FC, delay_s=0.3364 / FC)
    pre = post = 200  # 2 ms of context at 100 kHz
    windows = []
    for i in range(n):
        length = int(rng.integers(5, 80))
        k = np.arange(pre + length + post, dtype=np.float64)
        amp = rng.uniform(20e-12, 200e-12)
        kind = i % 3
        if kind == 0:
            clean = amp * np.exp(-np.clip(k - pre, 0, None) / (0.3 * length)) * (k >= pre)
        elif kind == 1:
            clean = amp * ((k >= pre) & (k < pre + length))
        else:
            clean = sum(amp * (k >= pre + s) * np.exp(-np.clip(k - pre - s, 0, None) / 4.0)
                        for s in (0, length // 3, 2 * length // 3))
        x = 1e-9 + signal.sosfilt(sos, clean) + rng.normal(0, NOISE, k.size)
        event = Event(pre, pre + length, 1e-9, NOISE, 1)
        windows.append(EventWindow(x, 0, pre, pre + length, FS, event, info))
    return windows


@pytest.mark.benchmark
@pytest.mark.parametrize("stage", [BaselineContext(), PulseShape(), PulseShape(decay_fit="log-linear"),
                                   BandwidthLimit()], ids=lambda s: f"{s.name}-{s.get_params().get('decay_fit', '')}")
def test_events_per_second(stage):
    windows = _windows(N_EVENTS)
    stage.measure(windows[0])  # warm caches and imports
    # CPU time of this process: other jobs on a shared machine slow the wall clock, not this.
    t0 = time.process_time()
    for w in windows:
        stage.measure(w)
    elapsed = time.process_time() - t0
    rate = len(windows) / elapsed
    print(f"\n{stage!r}: {rate:,.0f} events/s ({1e6 / rate:.0f} us/event, {len(windows)} events)")
    assert rate > GOAL_EVENTS_PER_S[stage.name]
