"""Conformance checks any plugin author can run on their stages (impactline runs them on every bundled one).

Example (in a lab's own test suite)::

    from impactline.testing import check_stage
    from mylab_plugin import MyFilter

    def test_my_filter_conforms():
        check_stage(MyFilter())

Each check raises ``AssertionError`` with a message that names the stage and what broke.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from .registry import check_stage_class
from .stages import Detector, Event, EventWindow, FeatureExtractor, Filter, FilterInfo, Stage

__all__ = ["synthetic_signal", "run_filter", "run_detector", "check_stage", "check_filter_streaming",
           "check_detector_streaming", "check_measure_robust", "CHUNK_SIZES"]

#: Chunk sizes the streaming checks use; ``None`` means the whole signal in one chunk.
CHUNK_SIZES: tuple[int | None, ...] = (4096, 10007, 65536, None)


def synthetic_signal(n: int = 300_000, fs: float = 250e3, seed: int = 7, noise_A: float = 1e-12,
                     n_events: int = 40, amplitude_A: float = 12e-12) -> tuple[np.ndarray, float]:
    """Noise plus spikes, blips, a burst and two steps, with events straddling 4096-sample borders.

    Returns the signal (A) and its sampling rate (Hz). For contract tests only (not a physical model;
    see :mod:`impactline.simulate` for that).
    """
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    x = noise_A * rng.standard_normal(n) + 3e-12 * np.sin(2 * np.pi * 50 * t / fs)
    starts = np.linspace(2000, n - 3000, n_events).astype(int)
    starts[::3] = (starts[::3] // 4096) * 4096 + 4096 - 5  # straddle chunk borders on purpose
    for i, s in enumerate(starts):
        kind = i % 4
        if kind == 0:  # spike with exponential decay
            length = 200
            x[s:s + length] += amplitude_A * np.exp(-np.arange(length) / 30.0)
        elif kind == 1:  # rectangular blip
            x[s:s + 25] += amplitude_A
        elif kind == 2:  # burst of sub-spikes
            for k in range(4):
                x[s + 40 * k:s + 40 * k + 60] += 0.8 * amplitude_A * np.exp(-np.arange(60) / 12.0)
        else:  # cathodic spike
            x[s:s + 80] -= amplitude_A * np.exp(-np.arange(80) / 20.0)
    x[n // 3:] += 0.5 * amplitude_A  # persistent steps
    x[2 * n // 3:] += 0.5 * amplitude_A
    return x, fs


def run_filter(filt: Filter, x: np.ndarray, fs: float, chunk: int | None) -> np.ndarray:
    """Stream ``x`` through ``filt`` in chunks of ``chunk`` samples (None: one chunk)."""
    state = filt.start(fs)
    step = x.size if chunk is None else chunk
    out = []
    for i in range(0, x.size, step):
        y, state = filt.process(x[i:i + step], state)
        out.append(np.asarray(y, dtype=np.float64))
    out.append(np.asarray(filt.finish(state), dtype=np.float64))
    return np.concatenate(out)


def run_detector(detector: Detector, x: np.ndarray, fs: float, chunk: int | None) -> list[Event]:
    """Stream ``x`` through ``detector`` in chunks; return all events."""
    state = detector.start(fs)
    step = x.size if chunk is None else chunk
    events: list[Event] = []
    for i in range(0, x.size, step):
        found, state = detector.process(x[i:i + step], i, state)
        events.extend(found)
    events.extend(detector.finish(state))
    return events


def check_filter_streaming(filt: Filter, x: np.ndarray | None = None, fs: float | None = None,
                           chunk_sizes: Sequence[int | None] = CHUNK_SIZES, rtol: float = 1e-9) -> None:
    """Chunked output equals whole-signal output; every input sample comes out once, aligned."""
    if x is None:
        x, fs = synthetic_signal()
    whole = run_filter(filt, x, fs, None)
    assert whole.shape == x.shape, f"{filt!r}: {whole.size} samples out for {x.size} in"
    assert np.all(np.isfinite(whole)), f"{filt!r}: non-finite output"
    scale = max(float(np.max(np.abs(x))), 1e-30)
    for chunk in chunk_sizes:
        if chunk is None:
            continue
        chunked = run_filter(filt, x, fs, chunk)
        assert chunked.shape == x.shape, f"{filt!r}: chunk {chunk}: {chunked.size} samples out for {x.size} in"
        worst = float(np.max(np.abs(chunked - whole)))
        assert worst <= rtol * scale, (
            f"{filt!r}: chunk size {chunk} differs from the whole-signal result by {worst:.3g} "
            f"(allowed {rtol * scale:.3g}) at sample {int(np.argmax(np.abs(chunked - whole)))}")


def _event_key(e: Event) -> tuple:
    return (e.start_index, e.end_index, e.polarity)


def check_detector_streaming(detector: Detector, x: np.ndarray | None = None, fs: float | None = None,
                             chunk_sizes: Sequence[int | None] = CHUNK_SIZES, rtol: float = 1e-9) -> list[Event]:
    """Same events (bounds, polarity, values within ``rtol``) whatever the chunking; each once, in order."""
    if x is None:
        x, fs = synthetic_signal()
    reference = run_detector(detector, x, fs, None)
    starts = [e.start_index for e in reference]
    assert starts == sorted(starts), f"{detector!r}: events not in start order"
    for e in reference:
        assert 0 <= e.start_index < e.end_index <= x.size, f"{detector!r}: bad event bounds {e}"
        assert set(e.extras) == set(detector.columns), (
            f"{detector!r}: extras {sorted(e.extras)} differ from declared columns {sorted(detector.columns)}")
    for chunk in chunk_sizes:
        if chunk is None:
            continue
        events = run_detector(detector, x, fs, chunk)
        assert [_event_key(e) for e in events] == [_event_key(e) for e in reference], (
            f"{detector!r}: chunk size {chunk} gives {len(events)} events, whole signal {len(reference)}; "
            f"first difference: {_first_difference(events, reference)}")
        for a, b in zip(events, reference, strict=True):
            for name in ("baseline_A", "noise_rms_A"):
                va, vb = getattr(a, name), getattr(b, name)
                assert np.isclose(va, vb, rtol=rtol, atol=1e-30), f"{detector!r}: chunk {chunk}: {name} {va} != {vb}"
            for name in detector.columns:
                va, vb = a.extras[name], b.extras[name]
                if isinstance(va, (float, np.floating)):
                    assert np.isclose(va, vb, rtol=rtol, equal_nan=True), f"{detector!r}: {name} {va} != {vb}"
                else:
                    assert va == vb, f"{detector!r}: chunk {chunk}: {name} {va!r} != {vb!r}"
    return reference


def _first_difference(a: list[Event], b: list[Event]) -> str:
    for i, (ea, eb) in enumerate(zip(a, b, strict=False)):
        if _event_key(ea) != _event_key(eb):
            return f"event {i}: {_event_key(ea)} vs {_event_key(eb)}"
    return f"lengths {len(a)} vs {len(b)}"


def check_measure_robust(measure: FeatureExtractor, fs: float = 250e3) -> None:
    """A measure returns every declared column, without raising, on awkward events."""
    rng = np.random.default_rng(3)
    info = FilterInfo(cutoff_hz=20e3, rise_time_s=0.35 / 20e3, delay_s=0.0)
    pre, post = measure.context_samples(fs)
    cases = []
    for length, polarity in ((1, 1), (2, -1), (3, 1), (50, 1), (50, -1), (2000, 1)):
        envelope = np.hanning(length + 2)[1:-1] if length > 2 else np.ones(length)
        body = polarity * 10e-12 * envelope
        for clip_pre, clip_post in ((pre, post), (0, post), (pre, 0), (0, 0)):
            noise_pre, noise_post = 1e-12 * rng.standard_normal(clip_pre), 1e-12 * rng.standard_normal(clip_post)
            signal = np.concatenate([noise_pre, body, noise_post])
            cases.append((signal, clip_pre, clip_pre + length, polarity))
    flat = np.zeros(pre + 20 + post)
    cases.append((flat, pre, pre + 20, 1))
    for signal, start, end, polarity in cases:
        event = Event(start, end, 0.0, 1e-12, polarity, {})
        window = EventWindow(signal=signal, window_start_index=0, start=start, end=end, sample_rate_hz=fs,
                             event=event, filter_info=info)
        values = measure.measure(window)
        missing = set(measure.columns) - set(values)
        assert not missing, f"{measure!r}: missing columns {sorted(missing)} for an event of {end - start} samples"
        for name, column in measure.columns.items():
            value = values[name]
            if column.dtype == "list<float32>":
                assert len(value) == column.length, f"{measure!r}: {name} has {len(value)} items, not {column.length}"


def check_stage(stage: Stage) -> None:
    """Run every check that applies to ``stage``'s kind."""
    problems = check_stage_class(type(stage))
    assert not problems, f"{type(stage).__name__}: " + "; ".join(problems)
    if isinstance(stage, Filter):
        check_filter_streaming(stage)
    elif isinstance(stage, Detector):
        check_detector_streaming(stage)
    elif isinstance(stage, FeatureExtractor):
        check_measure_robust(stage)
