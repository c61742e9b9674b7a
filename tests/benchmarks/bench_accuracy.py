"""Accuracy of the bundled stages on simulator recordings, beside a plain scipy script, plus their speed.

Run by hand (figures go in docs/detectors.md)::

    python3 tests/benchmarks/bench_accuracy.py --out /tmp/accuracy          # about 2.5 minutes
    python3 tests/benchmarks/bench_accuracy.py --out /tmp/accuracy --quick  # about 1 minute

or through pytest: ``python3 -m pytest -m benchmark tests/benchmarks/bench_accuracy.py -s`` (the full size;
figures under ``$TMPDIR``). The printed table is also written as ``accuracy.json`` and Parquet tables
(``bands.parquet``, ``matches.parquet``, ``scores.parquet``, ``speed.parquet``) in ``--out``.

Recordings
----------
For each sample rate (100 kHz, 250 kHz, 1 MHz; amplifier: 4-pole Bessel at ``fs / 5``, at most 100 kHz) the
simulator writes one recording per event shape (spike, burst, step, blip, tail_spike) and one of noise only.
Each shape's recording has its noise scaled so that the median true SNR of its events is sqrt(3 x 60) = 13.4,
the middle of the range 3-60 on a log scale, with a spread of diameters (and, for blips, of the oxidised
fraction) that puts nearly all events between SNR 2 and 80. Per-shape recordings let every false event be
traced to the shape that caused it.

SNR
---
Every SNR band below is of the **true** SNR of the simulator (``snr`` of ``NAME.truth.parquet``): the
noise-free peak of the event after the amplifier over the rms noise in the *recorded* bandwidth. The
pipeline's Bessel filter lowers the noise (most at 1 MHz, where the amplifier passes 100 kHz and the
pipeline keeps 25 kHz), so the SNR the pipeline measures (``snr`` of events.parquet) is higher; it is not
used for the bands except for false events that overlap no true event (see below).

Scores
------
Detections are matched one to one to the truth with :func:`impactline.compare.match_events` (the interval
matching of ``impactline compare``); :func:`impactline.compare.score_against_truth` gives the per-shape
recall (``scores.parquet``). Per SNR band: recall = matched / true events in the band; a false event that
overlaps true events (a fragment: a split tail, a burst cut in two) counts against the band of the
true event it belongs to (the largest true SNR of its overlap group); a false event that overlaps no true
event (noise) counts against the band of its *measured* SNR. F1 = 2 P R / (P + R).

Truth and detections are compared on the recording's clock. The simulator's truth times are those of the
electrode current; the recording lags them by the amplifier's group delay at DC (``amplifier_delay_s`` in the
truth metadata), so every true time is shifted by it before matching, and each true event is made at least
as long as the amplifier's settling time (``amplifier_settle_s``), so a 4 us blip at 100 kHz or the 1 us rise
of a step can overlap its detection at all (:func:`impactline.compare.load_truth` does both for any simulator
truth file; here events are also made at least one sample long). The runner already subtracts the DC group
delay of a causal pipeline filter (a zero-phase one has none). Start error = detected ``start_s`` - (true ``start_s`` +
``amplifier_delay_s``), in samples: both sides on the electrode's clock with every filter's DC delay removed.
Onset error (the goal) = detected ``onset_s`` - true half-height instant: the instant the noise-free electrode
current first reaches half of its first peak (:func:`electrode_half_height_s`; for a step, half its height),
plus the time the amplifier's step response takes to cross half height (:func:`amplifier_half_height_delay_s`).
Both are defined the same way; ``onset_s`` - true ``start_s`` is printed too. For the scipy script, which has no
``onset_s``, its ``start_s`` is held to the goal. Charge error = (detected ``charge_C`` - true
``signal_charge_C``) / true.

CUSUM steps are located against the true half-height instant as well (the goal rows; against the true onset
plus amplifier delay for information): a step that rises over 10 us has no sharper place than that.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from impactline import EventWindow
from impactline.compare import GroundTruth, load_truth, match_events, score_against_truth
from impactline.pipeline import Pipeline, parse_pipeline
from impactline.runner import chain_info, process_recording
from impactline.simulate import SHAPES, SimulationSpec, simulate, truth_table
from scipy import signal

REPO = Path(__file__).resolve().parents[2]
DEFAULT_PIPELINE = REPO / "pipelines" / "default.toml"
RATES_HZ: tuple[float, ...] = (100e3, 250e3, 1e6)
#: Median true SNR of each shape's recording: the geometric middle of the goal's range 3-60.
TARGET_SNR = math.sqrt(3.0 * 60.0)
#: Band edges of the true SNR.
SNR_EDGES: tuple[float, ...] = (0.0, 3.0, 5.0, 8.0, 12.0, 20.0, 60.0, math.inf)
#: Geometric sd of the diameters per shape, chosen so the SNRs spread over 3-60: a spike's peak goes as d^2
#: (charge d^3 over a decay time proportional to d), a step's height as d, a blip's and a burst's as d^3.
SHAPE_GSD = {"spike": 1.5, "burst": 1.3, "step": 2.2, "blip": 1.25, "tail_spike": 1.5}
NOISE = "noise"
#: Steps whose electrode current rises in 1 us (below every amplifier's rise time), so the change has a
#: well-defined place; the simulator's default 10 us rise puts its midpoint 6.9 us (7 samples at 1 MHz) late.
STEP_FAST = "step_fast"
FAST_STEP_RISE_S = 1e-6
#: The shapes that are pulses (a step is a lasting change of level, not a pulse).
PULSES = tuple(shape for shape in SHAPES if shape != "step")
CHUNK = 1 << 20
MAD_TO_SIGMA = 1.482602218505602

#: Goals of the issue (true SNR bands).
GOAL_F1_HIGH, GOAL_F1_MID = 0.95, 0.80
GOAL_FALSE_PER_10S = 1.0
GOAL_CHARGE_REL = 0.05
GOAL_ONSET_SAMPLES = 2.0
GOAL_STEP_SAMPLES = 3.0


# ================================================================================================ recordings
@dataclass(frozen=True)
class Size:
    """How much to simulate: seconds per shape recording, seconds of noise, collisions per second."""

    shape_s: float = 16.0
    noise_s: float = 60.0
    rate_per_s: float = 15.0
    rates_hz: tuple[float, ...] = RATES_HZ
    shapes: tuple[str, ...] = SHAPES


FULL = Size(shape_s=16.0, noise_s=60.0)
QUICK = Size(shape_s=4.0, noise_s=10.0)


def amplifier_bandwidth(fs: float) -> float:
    """-3 dB frequency of the simulated amplifier at sample rate ``fs``, Hz: fs / 5, at most 100 kHz."""
    return min(fs / 5.0, 100e3)


def shape_spec(shape: str, fs: float, duration_s: float, rate_per_s: float, seed: int,
               target_snr: float = TARGET_SNR, gsd: float | None = None, **settings: Any) -> SimulationSpec:
    """A recording of one shape whose events have a median true SNR of ``target_snr``.

    The noise of every source is scaled by one factor (``SimulationSpec.with_noise_scale``), found from the
    truth table at unit scale: the SNR is inversely proportional to it.
    """
    base = SimulationSpec(name=f"{shape}_{fs / 1e3:g}kHz", sample_rate_hz=fs, bandwidth_hz=amplifier_bandwidth(fs),
                          duration_s=duration_s, collision_rate_per_s=rate_per_s, shape_weights={shape: 1.0},
                          diameter_gsd=SHAPE_GSD[shape] if gsd is None else gsd, seed=seed, **settings)
    snr = np.asarray(truth_table(base).column("snr").to_numpy(), dtype=float)
    if snr.size == 0:
        raise RuntimeError(f"{base.name}: no event simulated; lengthen the recording")
    return base.with_noise_scale(float(np.median(snr)) / target_snr)


def noise_spec(fs: float, duration_s: float, seed: int) -> SimulationSpec:
    """Event-free noise at the level of the spike recording of the same rate."""
    spikes = shape_spec("spike", fs, 4.0, 15.0, seed)
    return replace(spikes, name=f"{NOISE}_{fs / 1e3:g}kHz", duration_s=duration_s, collision_rate_per_s=0.0,
                   seed=seed + 1000)


@dataclass
class Recording:
    """One simulated recording and its facts."""

    kind: str             # a shape, or "noise"
    fs: float
    path: Path
    truth_path: Path
    duration_s: float
    amplifier_delay_s: float
    noise_rms_A: float
    truth: GroundTruth = field(repr=False, default=None)


def recorded_truth(truth: GroundTruth, fs: float) -> GroundTruth:
    """Truth events lasting at least one sample.

    ``load_truth`` already puts the simulator's times on the recording's clock (amplifier delay and settling
    time, from the truth metadata); an event shorter than a sample (a 4 us blip at 100 kHz) is widened to one
    so that it can overlap its detection on the sample grid.
    """
    events = truth.events
    start = np.asarray(events.column("start_s").to_numpy(), dtype=float)
    end = np.maximum(np.asarray(events.column("end_s").to_numpy(), dtype=float), start + 1.0 / fs)
    i = events.schema.get_field_index("end_s")
    return replace(truth, events=events.set_column(i, events.schema.field(i), pa.array(end)))


#: Grid step and span of the noise-free electrode current used to find each event's half-height instant, s.
_HALF_GRID_S = 10e-9
_HALF_SPAN_S = 400e-6


def electrode_half_height_s(spec: SimulationSpec) -> np.ndarray:
    """Half-height instant of each true event's electrode current, s (truth-table order).

    The instant the noise-free current first reaches half of its first peak (a step: half its height), the 50 %
    reference level instant of IEEE Std 181-2011 (from memory): the same definition as the pipeline's
    ``onset_s`` and the place a change-point estimate puts a step. The current is rebuilt from the simulator's
    event components with the simulator's own formulas (private catalogue: the truth table holds the onset but
    not the rise time constants), as its mean over 10 ns cells, over 400 us from the onset.
    """
    from impactline.simulate import _component_values, _prepare  # noqa: PLC0415 - not public API

    _, catalogue, _ = _prepare(spec)
    c = catalogue.components
    onsets = np.array([row["start_s"] for row in catalogue.rows], dtype=float)
    cells = int(round(_HALF_SPAN_S / _HALF_GRID_S))
    out = np.full(len(onsets), np.nan)
    for event, onset in enumerate(onsets):
        current = np.zeros(cells)
        for i in np.flatnonzero(c.event == event):
            current += _component_values(int(c.kind[i]), float(c.q[i]), float(c.a[i]), float(c.b[i]),
                                         float(c.t0[i] - onset), 0, cells, 1.0 / _HALF_GRID_S)
        rising = np.sign(current[np.argmax(np.abs(current))]) * current
        running = np.maximum.accumulate(rising)
        fallen = np.flatnonzero(running - rising > 1e-9 * running.max())
        peak = running[fallen[0]] if fallen.size else running[-1]
        k = int(np.flatnonzero(rising >= 0.5 * peak)[0])
        frac = 0.0 if k == 0 else (0.5 * peak - rising[k - 1]) / (rising[k] - rising[k - 1])
        out[event] = onset + (k - 1 + frac if k else 0.0) * _HALF_GRID_S
    return out


def amplifier_half_height_delay_s(spec: SimulationSpec) -> float:
    """Time from a current step to the half-height crossing of the amplifier's recorded step response, s.

    The amplifier is ``scipy.signal.bessel(order, bandwidth, norm="mag")`` (as in the simulator); a sample
    averages the current over its own sampling interval centred on its time stamp, so a step at sample
    index 0 of the filter's input is a current step half a sample earlier.
    """
    fs = spec.sample_rate_hz
    sos = signal.bessel(spec.bessel_order, spec.bandwidth_hz, btype="low", norm="mag", output="sos", fs=fs)
    step = signal.sosfilt(sos, np.ones(int(64 * fs / spec.bandwidth_hz) + 64))
    k = int(np.flatnonzero(step >= 0.5)[0])
    crossing = k - 1 + (0.5 - step[k - 1]) / (step[k] - step[k - 1]) if k else 0.0
    return (crossing + 0.5) / fs


def make_recordings(folder: Path, size: Size, seed: int = 0) -> list[Recording]:
    """Write every recording of ``size`` into ``folder``."""
    recordings = []
    for i, fs in enumerate(size.rates_hz):
        specs = [(shape, shape_spec(shape, fs, size.shape_s, size.rate_per_s, seed + 10 * i + j))
                 for j, shape in enumerate(size.shapes)]
        if "step" in size.shapes:
            fast = shape_spec("step", fs, size.shape_s, size.rate_per_s, seed + 10 * i + 7,
                              step_rise_s=FAST_STEP_RISE_S)
            specs.append((STEP_FAST, replace(fast, name=f"{STEP_FAST}_{fs / 1e3:g}kHz")))
        specs.append((NOISE, noise_spec(fs, size.noise_s, seed + 10 * i)))
        recordings += [write_recording(kind, spec, folder) for kind, spec in specs]
    return recordings


def write_recording(kind: str, spec: SimulationSpec, folder: Path) -> Recording:
    """Simulate ``spec`` into ``folder`` (``<name>.bin``) and load its truth on the recording's clock."""
    result = simulate(spec, folder / f"{spec.name}.bin", overwrite=True)
    truth = recorded_truth(load_truth(result.truth_path, recording=str(result.data_path)), spec.sample_rate_hz)
    half = electrode_half_height_s(spec) + amplifier_half_height_delay_s(spec)
    truth = replace(truth, events=truth.events.append_column("half_height_s", pa.array(half)))
    return Recording(kind, spec.sample_rate_hz, result.data_path, result.truth_path, result.duration_s,
                     result.amplifier_delay_s, result.noise_rms_A, truth)


# ================================================================================================ variants
@dataclass
class Variant:
    """A way of finding events: a pipeline, or a plain function of the recording."""

    name: str
    kinds: tuple[str, ...]                    # recording kinds it runs on
    pipeline: Callable[[float], Pipeline] | None = None
    script: Callable[[Recording], pa.Table] | None = None

    def events(self, recording: Recording) -> tuple[pa.Table, float]:
        """Events of one recording and the seconds taken."""
        started = time.perf_counter()
        if self.pipeline is not None:
            table = process_recording(self.pipeline(recording.fs), recording.path).events
        else:
            table = self.script(recording)
        return table, time.perf_counter() - started


def default_pipeline_text() -> str:
    return DEFAULT_PIPELINE.read_text(encoding="utf-8")


def causal_pipeline_text() -> str:
    """The default pipeline with its Bessel filter in causal mode (the runner subtracts its group delay)."""
    text = default_pipeline_text()
    if text.count('mode = "zero-phase"') != 1:
        raise RuntimeError(f"{DEFAULT_PIPELINE}: expected one 'mode = \"zero-phase\"' line to switch to causal")
    return text.replace('mode = "zero-phase"', 'mode = "causal"')


def cusum_pipeline_text(fs: float) -> str:
    """CUSUM on the recording as recorded, on means of groups of 2 / bandwidth (nearly independent)."""
    group = 2.0 / amplifier_bandwidth(fs)
    return (f'[pipeline]\nname = "cusum"\n\n[reader]\nuse = "auto"\n\n[detector]\nuse = "cusum"\n'
            f'group = "{group * 1e6:g} us"\n')


def _cached(make: Callable[[], str]) -> Callable[[float], Pipeline]:
    cache: dict[str, Pipeline] = {}

    def get(fs: float) -> Pipeline:
        text = make()
        if text not in cache:
            cache[text] = parse_pipeline(text, source=str(DEFAULT_PIPELINE), base_dir=DEFAULT_PIPELINE.parent)
        return cache[text]

    return get


def _cusum(fs: float) -> Pipeline:
    return parse_pipeline(cusum_pipeline_text(fs), source=f"cusum-{fs:g}Hz")


def read_recording(recording: Recording) -> np.ndarray:
    """Samples of a simulator recording, A (float64), from its raw file and sidecar."""
    sidecar = json.loads(recording.path.with_suffix(".json").read_text(encoding="utf-8"))
    raw = np.fromfile(recording.path, dtype=np.dtype(sidecar["dtype"]))
    return raw.astype(np.float64) * float(sidecar["gain_A_per_count"]) + float(sidecar["offset_A"])


def plain_scipy_events(recording: Recording, k_sigma: float = 5.0, cutoff_hz: float | None = None,
                       order: int = 4, release_sigma: float = 1.0) -> pa.Table:
    """What a short hand-written scipy script finds: ``filtfilt`` + ``find_peaks``.

    Bessel low-pass (``scipy.signal.bessel(order, cutoff, norm="mag")``, cutoff by default that of the default
    pipeline, so the two see the same bandwidth setting) run forward and backward with
    ``filtfilt`` (so the applied response is the square of the design's, -6 dB at ``cutoff``); baseline = the
    median of the whole record; sigma = 1.4826 x its median absolute deviation; peaks above ``k_sigma`` sigma
    by ``find_peaks``; each peak's event runs between the samples where the signal last and next falls below
    ``release_sigma`` sigma (peaks sharing those bounds are one event); charge = sum of the samples over it.
    """
    fs = recording.fs
    if cutoff_hz is None:
        cutoff_hz = _cached(default_pipeline_text)(fs).build_filters()[0].cutoff
    x = read_recording(recording)
    b, a = signal.bessel(order, cutoff_hz, btype="low", norm="mag", fs=fs)
    y = signal.filtfilt(b, a, x)
    baseline = float(np.median(y))
    d = y - baseline
    sigma = MAD_TO_SIGMA * float(np.median(np.abs(d)))
    peaks, _ = signal.find_peaks(d, height=k_sigma * sigma)
    below = np.flatnonzero(d < release_sigma * sigma)
    where = np.searchsorted(below, peaks)
    left = np.where(where > 0, below[np.maximum(where - 1, 0)] + 1, 0)
    right = np.where(where < below.size, below[np.minimum(where, below.size - 1)], d.size)
    bounds = np.unique(np.stack([left, right], axis=1), axis=0) if peaks.size else np.zeros((0, 2), np.int64)
    cums = np.concatenate(([0.0], np.cumsum(d)))
    charge = (cums[bounds[:, 1]] - cums[bounds[:, 0]]) / fs
    peak = np.array([d[lo:hi].max() for lo, hi in bounds]) if len(bounds) else np.zeros(0)
    n = len(bounds)
    return pa.table({"file": [str(recording.path)] * n, "event_id": np.arange(n, dtype=np.int64),
                     "start_s": bounds[:, 0] / fs, "end_s": bounds[:, 1] / fs, "charge_C": charge,
                     "snr": peak / sigma if sigma > 0 else peak})


def variants() -> list[Variant]:
    """The variants compared: the default pipeline (zero-phase Bessel), the same with a causal Bessel, the
    plain scipy script, and the CUSUM detector (on steps and noise)."""
    event_kinds = (*SHAPES, NOISE)
    return [
        Variant("default", event_kinds, pipeline=_cached(default_pipeline_text)),
        Variant("causal", event_kinds, pipeline=_cached(causal_pipeline_text)),
        Variant("scipy", event_kinds, script=plain_scipy_events),
        Variant("cusum", ("step", STEP_FAST, NOISE), pipeline=_cusum),
    ]


# ================================================================================================ scoring
def match_rows(recording: Recording, events: pa.Table, variant: str) -> dict[str, np.ndarray]:
    """Match one recording's detections to its truth; per match row: outcome, true and measured SNR, errors.

    Matching is :func:`impactline.compare.match_events`; false events that overlap true events take the
    largest true SNR of their overlap group (``attributed_snr``), the others their measured SNR.
    """
    truth_events = recording.truth.events.rename_columns(
        ["event_id" if c == "truth_id" else c for c in recording.truth.events.column_names])
    m = match_events(truth_events, events, recording.fs, name_a="truth", name_b=variant,
                     files=[str(recording.path)])
    n = m.num_rows
    outcome = np.asarray(m.column("outcome").to_pylist(), dtype=object)
    group = np.asarray(m.column("group").to_numpy(), dtype=np.int64)
    truth_id = m.column("event_id_a").to_numpy(zero_copy_only=False)
    det_id = m.column("event_id_b").to_numpy(zero_copy_only=False)
    has_truth = np.isfinite(truth_id.astype(float))
    has_det = np.isfinite(det_id.astype(float))
    t_snr = np.asarray(recording.truth.events.column("snr").to_numpy(), dtype=float)
    t_class = np.asarray(recording.truth.events.column("class").to_pylist(), dtype=object)
    d_snr = np.asarray(events.column("snr").to_numpy(), dtype=float) if events.num_rows else np.zeros(0)
    ti = np.where(has_truth, np.nan_to_num(truth_id.astype(float)), 0).astype(np.int64)
    di = np.where(has_det, np.nan_to_num(det_id.astype(float)), 0).astype(np.int64)
    true_snr = np.where(has_truth, t_snr[ti] if t_snr.size else np.nan, np.nan)
    shape = np.where(has_truth, t_class[ti] if t_class.size else None, None)
    measured = np.where(has_det, d_snr[di] if d_snr.size else np.nan, np.nan)
    attributed = true_snr.copy()
    fragment = np.zeros(n, dtype=bool)
    for g in np.unique(group[outcome == "only_b"]):
        rows = group == g
        truths = rows & has_truth
        lone = rows & (outcome == "only_b")
        if truths.any():
            best = np.flatnonzero(truths)[np.argmax(true_snr[truths])]
            attributed[lone] = true_snr[best]
            shape[lone] = shape[best]
            fragment[lone] = True
        else:
            attributed[lone] = measured[lone]
    onset = np.asarray(m.column("onset_diff_s").to_numpy(zero_copy_only=False), dtype=float)
    # The half-height onset (core column onset_s) against the truth start on the recording's clock.
    both = has_truth & has_det
    half_height = np.full(n, np.nan)
    t_half = np.asarray(truth_events.column("half_height_s").to_numpy(), dtype=float)
    if "onset_s" in events.column_names and events.num_rows:
        d_onset = np.asarray(events.column("onset_s").to_numpy(zero_copy_only=False), dtype=float)
        t_start = np.asarray(truth_events.column("start_s").to_numpy(), dtype=float)
        half_height[both] = d_onset[di[both]] - t_start[ti[both]]
    # Like with like: the onset_s (half-height instant) against the true half-height instant; a detector's
    # start_s against it too (for the CUSUM the start is the change point, a half-height estimate).
    onset_half = np.full(n, np.nan)
    start_half = np.full(n, np.nan)
    if events.num_rows:
        if "onset_s" in events.column_names:
            onset_half[both] = d_onset[di[both]] - t_half[ti[both]]
        d_start = np.asarray(events.column("start_s").to_numpy(zero_copy_only=False), dtype=float)
        start_half[both] = d_start[di[both]] - t_half[ti[both]]
    charge_a = np.asarray(m.column("charge_C_a").to_numpy(zero_copy_only=False), dtype=float)
    charge_b = np.asarray(m.column("charge_C_b").to_numpy(zero_copy_only=False), dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        charge_rel = (charge_b - charge_a) / np.abs(charge_a)
    return {
        "variant": np.full(n, variant, dtype=object), "recording": np.full(n, recording.kind, dtype=object),
        "sample_rate_hz": np.full(n, recording.fs), "outcome": outcome, "shape": shape, "true_snr": true_snr,
        "measured_snr": measured, "attributed_snr": attributed, "fragment": fragment,
        "onset_error_samples": onset * recording.fs,
        "onset_s_error_samples": half_height * recording.fs,
        "onset_s_half_error_samples": onset_half * recording.fs,
        "start_half_error_samples": start_half * recording.fs,
        "charge_rel_error": charge_rel,
    }


def _concat(parts: list[dict[str, np.ndarray]]) -> dict[str, np.ndarray]:
    return {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}


def band_f1(rows: dict[str, np.ndarray], low: float, high: float) -> dict[str, Any]:
    """Precision, recall and F1 for true SNR in ``[low, high)`` (false events by their attributed SNR)."""
    in_truth = (rows["true_snr"] >= low) & (rows["true_snr"] < high)
    in_false = (rows["attributed_snr"] >= low) & (rows["attributed_snr"] < high)
    outcome = rows["outcome"]
    tp = int(np.sum(in_truth & (outcome == "matched")))
    fn = int(np.sum(in_truth & (outcome == "only_a")))
    fp = int(np.sum(in_false & (outcome == "only_b")))
    precision = tp / (tp + fp) if tp + fp else math.nan
    recall = tp / (tp + fn) if tp + fn else math.nan
    f1 = 2 * precision * recall / (precision + recall) if tp else (0.0 if tp + fn else math.nan)
    return {"snr_low": low, "snr_high": high, "n_truth": tp + fn, "tp": tp, "fn": fn, "fp": fp,
            "precision": precision, "recall": recall, "f1": f1}


def _select(rows: dict[str, np.ndarray], mask: np.ndarray) -> dict[str, np.ndarray]:
    return {k: v[mask] for k, v in rows.items()}


# ================================================================================================ the run
@dataclass
class Result:
    """Everything measured: match rows, scores, noise counts, speeds, times."""

    rows: dict[str, np.ndarray]
    scores: pa.Table
    noise: list[dict[str, Any]]
    timings: list[dict[str, Any]]
    recordings: list[Recording] = field(default_factory=list)
    speed: list[dict[str, Any]] = field(default_factory=list)
    seconds: float = 0.0


def run_accuracy(folder: Path, size: Size = FULL, seed: int = 0, which: Iterable[Variant] | None = None,
                 log: Callable[[str], None] = print) -> Result:
    """Simulate, run every variant on every recording it applies to, and score."""
    started = time.perf_counter()
    recordings = make_recordings(folder, size, seed)
    log(f"simulated {len(recordings)} recordings in {time.perf_counter() - started:.1f} s")
    parts, scores, noise, timings = [], [], [], []
    for variant in which or variants():
        for recording in recordings:
            if recording.kind not in variant.kinds:
                continue
            events, seconds = variant.events(recording)
            n_samples = int(round(recording.duration_s * recording.fs))
            timings.append({"variant": variant.name, "recording": recording.kind, "sample_rate_hz": recording.fs,
                            "seconds": seconds, "samples_per_s": n_samples / seconds})
            if recording.kind == NOISE:
                noise.append({"variant": variant.name, "sample_rate_hz": recording.fs,
                              "duration_s": recording.duration_s, "false_events": events.num_rows})
                continue
            parts.append(match_rows(recording, events, variant.name))
            score = score_against_truth(recording.truth, events, recording.fs, variant=variant.name,
                                        durations={str(recording.path): recording.duration_s},
                                        snr_edges=SNR_EDGES)
            extra = pa.table({"recording": [recording.kind] * score.num_rows,
                              "sample_rate_hz": [recording.fs] * score.num_rows})
            for name in extra.column_names:
                score = score.append_column(name, extra.column(name))
            scores.append(score)
        log(f"variant {variant.name}: done at {time.perf_counter() - started:.1f} s")
    return Result(_concat(parts), pa.concat_tables(scores), noise, timings, recordings,
                  seconds=time.perf_counter() - started)


# ================================================================================================ summaries
def _median(values: np.ndarray) -> float:
    values = values[np.isfinite(values)]
    return float(np.median(values)) if values.size else math.nan


def goal_table(result: Result) -> list[dict[str, Any]]:
    """One row per (goal, sample rate or 'all', variant): the measured figure and whether it meets the goal."""
    rows = result.rows
    out = []
    names = list(dict.fromkeys(rows["variant"].tolist()))
    rates = sorted(set(rows["sample_rate_hz"].tolist()))
    not_step = np.isin(rows["recording"], PULSES)

    def add(goal: str, rate: Any, variant: str, value: float, meets: bool | None, n: int, detail: str = ""):
        out.append({"goal": goal, "sample_rate": rate, "variant": variant, "value": value,
                    "meets": meets, "n": n, "detail": detail})

    for variant in names:
        mine = rows["variant"] == variant
        for rate in [*rates, "all"]:
            at = mine if rate == "all" else mine & (rows["sample_rate_hz"] == rate)
            label = rate if rate == "all" else f"{rate / 1e3:g} kHz"
            if variant != "cusum":
                sel = _select(rows, at & not_step)
                high = band_f1(sel, 8.0, math.inf)
                mid = band_f1(sel, 5.0, 8.0)
                add("F1, SNR >= 8 (no steps)", label, variant, high["f1"], high["f1"] >= GOAL_F1_HIGH, high["n_truth"],
                    f"P {high['precision']:.3f} R {high['recall']:.3f} fp {high['fp']}")
                add("F1, SNR 5-8 (no steps)", label, variant, mid["f1"], mid["f1"] >= GOAL_F1_MID, mid["n_truth"],
                    f"P {mid['precision']:.3f} R {mid['recall']:.3f} fp {mid['fp']}")
                steps = _select(rows, at & ~not_step)
                if steps["outcome"].size:
                    s = band_f1(steps, 8.0, math.inf)
                    add("F1, steps SNR >= 8", label, variant, s["f1"], s["f1"] >= GOAL_F1_HIGH, s["n_truth"],
                        f"P {s['precision']:.3f} R {s['recall']:.3f} fp {s['fp']}")
                spikes = at & (rows["shape"] == "spike") & (rows["true_snr"] >= 10) & (rows["outcome"] == "matched")
                charge = _median(rows["charge_rel_error"][spikes])
                add("charge error, spikes SNR >= 10 (median rel.)", label, variant, charge,
                    abs(charge) <= GOAL_CHARGE_REL, int(spikes.sum()))
                onset_sel = at & not_step & (rows["true_snr"] >= 8) & (rows["outcome"] == "matched")
                err = rows["onset_error_samples"][onset_sel]
                within = float(np.mean(np.abs(err) <= GOAL_ONSET_SAMPLES)) if err.size else math.nan
                # The detector's start is the onset estimate only of a variant without onset_s (the scipy script).
                has_onset_s = bool(np.isfinite(rows["onset_s_half_error_samples"][onset_sel]).any())
                add("start_s - true start, SNR >= 8, median (samples)", label, variant, _median(err),
                    None if has_onset_s else abs(_median(err)) <= GOAL_ONSET_SAMPLES, int(err.size),
                    f"median |e| {_median(np.abs(err)):.2f}, {100 * within:.0f} % within 2")
                for column, what, goal in (("onset_s_error_samples", "onset_s - true start", None),
                                           ("onset_s_half_error_samples", "onset_s - true half-height", True)):
                    err = rows[column][onset_sel]
                    err = err[np.isfinite(err)]
                    if not err.size:
                        continue
                    within = float(np.mean(np.abs(err) <= GOAL_ONSET_SAMPLES))
                    typical = _median(np.abs(err))
                    add(f"{what}, SNR >= 8, median |e| (samples)", label, variant, typical,
                        typical <= GOAL_ONSET_SAMPLES if goal else None, int(err.size),
                        f"median {_median(err):+.2f}, {100 * within:.0f} % within 2")
            else:
                for kind, rise in (("step", "10 us rise"), (STEP_FAST, "1 us rise")):
                    steps = at & (rows["recording"] == kind)
                    sel = steps & (rows["true_snr"] >= 3) & (rows["outcome"] == "matched")
                    s = band_f1(_select(rows, steps), 3.0, math.inf)
                    for column, truth, goal in (("onset_error_samples", "true start", None),
                                                ("start_half_error_samples", "true half-height", True)):
                        err = rows[column][sel]
                        within = float(np.mean(np.abs(err) <= GOAL_STEP_SAMPLES)) if err.size else math.nan
                        add(f"step location - {truth} ({rise}), SNR >= 3, share within 3", label, variant, within,
                            within >= 0.95 if goal else None, int(err.size), f"median {_median(err):+.2f}, "
                            f"median |e| {_median(np.abs(err)):.2f} samples; recall {s['recall']:.3f}, fp {s['fp']}")
    for variant in dict.fromkeys(r["variant"] for r in result.noise):
        for rate in [*sorted({r["sample_rate_hz"] for r in result.noise}), "all"]:
            sel = [r for r in result.noise
                   if r["variant"] == variant and (rate == "all" or r["sample_rate_hz"] == rate)]
            count = sum(r["false_events"] for r in sel)
            seconds = sum(r["duration_s"] for r in sel)
            per_10 = 10.0 * count / seconds
            add("false events per 10 s of noise", rate if rate == "all" else f"{rate / 1e3:g} kHz", variant, per_10,
                per_10 < GOAL_FALSE_PER_10S, count, f"{count} in {seconds:g} s")
    return out


def band_table(result: Result) -> list[dict[str, Any]]:
    """F1 per variant, sample rate (and all), shape (and all but steps) and true SNR band."""
    rows = result.rows
    out = []
    for variant in dict.fromkeys(rows["variant"].tolist()):
        for rate in [*sorted(set(rows["sample_rate_hz"].tolist())), math.nan]:
            for shape in ["all but step", *SHAPES, STEP_FAST]:
                mask = rows["variant"] == variant
                if not math.isnan(rate):
                    mask &= rows["sample_rate_hz"] == rate
                mask &= np.isin(rows["recording"], PULSES) if shape == "all but step" else (rows["recording"] == shape)
                if not mask.any():
                    continue
                sel = _select(rows, mask)
                for low, high in zip(SNR_EDGES[:-1], SNR_EDGES[1:], strict=True):
                    out.append({"variant": variant, "sample_rate_hz": rate, "shape": shape, **band_f1(sel, low, high)})
    return out


def _fmt(value: Any, digits: int = 3) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return "-" if not math.isfinite(value) else f"{value:.{digits}g}"
    return str(value)


def format_report(result: Result) -> str:
    """The printed tables: goals, F1 by band, speed."""
    lines = [f"accuracy benchmark: {result.seconds:.0f} s", "", "GOALS (true SNR; see the module docstring)"]
    goals = goal_table(result)
    header = ["goal", "rate", "variant", "value", "goal met", "n", "detail"]
    body = [[g["goal"], str(g["sample_rate"]), g["variant"], _fmt(g["value"]),
             {True: "yes", False: "NO", None: "-"}[g["meets"]], str(g["n"]), g["detail"]] for g in goals]
    lines += _grid(header, body)
    lines += ["", "F1 BY TRUE SNR BAND, all shapes but steps, all rates (recall n; false events by attributed SNR)"]
    bands = [b for b in band_table(result) if math.isnan(b["sample_rate_hz"]) and b["shape"] == "all but step"]
    names = list(dict.fromkeys(b["variant"] for b in bands))
    edges = list(dict.fromkeys((b["snr_low"], b["snr_high"]) for b in bands))
    body = []
    for low, high in edges:
        cells = [f"[{low:g}, {high:g})"]
        for name in names:
            b = next((b for b in bands if b["variant"] == name and b["snr_low"] == low), None)
            cells.append("-" if b is None or not b["n_truth"] else
                         f"{_fmt(b['f1'])} (R {_fmt(b['recall'])}, {b['n_truth']}, fp {b['fp']})")
        body.append(cells)
    lines += _grid(["true SNR", *names], body)
    lines += ["", "RECALL BY SHAPE AND RATE (score_against_truth)"]
    shapes = result.scores.filter(pa.compute.equal(result.scores.column("stratum"), "class")).to_pylist()
    body = []
    for shape in SHAPES:
        cells = [shape]
        for name in names:
            sel = [s for s in shapes if s["variant"] == name and s["value"] == shape]
            tp, n = sum(s["tp"] for s in sel), sum(s["n_truth"] for s in sel)
            cells.append(f"{tp / n:.3f} ({tp}/{n})" if n else "-")
        body.append(cells)
    lines += _grid(["shape", *names], body)
    if result.speed:
        lines += ["", "SPEED (wall clock, best of the repeats; this machine's load varies)"]
        lines += _grid(["stage", "on", "rate"], [[s["stage"], s["on"], f"{s['rate']:.3g} {s['unit']}"]
                                                  for s in result.speed])
    return "\n".join(lines)


def _grid(header: list[str], rows: list[list[str]]) -> list[str]:
    widths = [max(len(str(x)) for x in col) for col in zip(header, *rows, strict=True)]
    fmt = "  ".join(f"{{:<{w}}}" for w in widths)
    return [fmt.format(*header), "  ".join("-" * w for w in widths)] + [fmt.format(*r) for r in rows]


# ================================================================================================ speed
def _best(run: Callable[[], Any], repeat: int) -> float:
    best = math.inf
    for _ in range(repeat):
        started = time.perf_counter()
        run()
        best = min(best, time.perf_counter() - started)
    return best


def _stream_filter(stage, x: np.ndarray, fs: float) -> None:
    state = stage.start(fs)
    for lo in range(0, x.size, CHUNK):
        _, state = stage.process(x[lo:lo + CHUNK], state)
    stage.finish(state)


def _stream_detector(stage, x: np.ndarray, fs: float) -> list:
    state = stage.start(fs)
    found = []
    for lo in range(0, x.size, CHUNK):
        events, state = stage.process(x[lo:lo + CHUNK], lo, state)
        found += events
    return found + stage.finish(state)


def measure_speed(recording: Recording, repeat: int = 2) -> list[dict[str, Any]]:
    """Samples/s of each filter and detector, events/s of each measure, on one recording, chunks of 2^20.

    Filters and detectors get the recording's samples through ``start``/``process``/``finish``; measures get
    the default pipeline's events on the zero-phase filtered signal, each with the context it asks for.
    """
    from impactline.bandwidth import run_filters
    from impactline_plugins.detectors import CusumDetector, ThresholdDetector
    from impactline_plugins.filters import Baseline, Bessel, Mains, Wavelet
    from impactline_plugins.measures import BandwidthLimit, BaselineContext, PulseShape

    fs = recording.fs
    x = read_recording(recording)
    on = f"{recording.path.name}, {x.size:.3g} samples"
    out = []
    pipeline = _cached(default_pipeline_text)(fs)
    (zero_phase,) = pipeline.build_filters()
    cutoff = f"{zero_phase.cutoff / 1e3:g} kHz"
    filters = [(f"bessel zero-phase {cutoff}", zero_phase),
               (f"bessel causal {cutoff}", Bessel(order=zero_phase.order, cutoff=zero_phase.cutoff, mode="causal")),
               ("wavelet (defaults)", Wavelet()), ("baseline (defaults)", Baseline()), ("mains (defaults)", Mains())]
    for name, stage in filters:
        seconds = _best(lambda stage=stage: _stream_filter(stage, x, fs), repeat)
        out.append({"stage": name, "on": on, "rate": x.size / seconds, "unit": "samples/s"})
    y = run_filters([zero_phase], x, fs)
    group = 2.0 / amplifier_bandwidth(fs)
    for name, stage, data in (("threshold (defaults), filtered", ThresholdDetector(), y),
                              ("cusum (defaults), filtered", CusumDetector(), y),
                              (f"cusum group {group * 1e6:g} us, as recorded", CusumDetector(group=group), x)):
        seconds = _best(lambda stage=stage, data=data: _stream_detector(stage, data, fs), repeat)
        out.append({"stage": name, "on": on, "rate": x.size / seconds, "unit": "samples/s"})
    events = _stream_detector(pipeline.build_detector(), y, fs)
    info = chain_info([zero_phase], fs)
    for stage in (BaselineContext(), PulseShape(), BandwidthLimit()):
        pre, post = stage.context_samples(fs)
        windows = []
        for event in events:
            lo, hi = max(0, event.start_index - pre), min(y.size, event.end_index + post)
            windows.append(EventWindow(y[lo:hi], lo, event.start_index - lo, event.end_index - lo, fs, event, info))
        seconds = _best(lambda stage=stage, windows=windows: [stage.measure(w) for w in windows], repeat)
        out.append({"stage": f"measure {stage.name}", "on": f"{len(windows)} events of {recording.path.name}",
                    "rate": len(windows) / seconds, "unit": "events/s"})
    for name, variant in (("default pipeline end to end", variants()[0]), ("plain scipy script", variants()[2])):
        seconds = _best(lambda variant=variant: variant.events(recording), repeat)
        out.append({"stage": name, "on": on, "rate": x.size / seconds, "unit": "samples/s"})
    return out


# ================================================================================================ output
def write_results(result: Result, out: Path) -> None:
    """``accuracy.json`` (goals, bands, noise, timings, speed) and Parquet tables in ``out``."""
    out.mkdir(parents=True, exist_ok=True)
    rows = {k: (v.tolist() if v.dtype != object else [None if x is None else x for x in v.tolist()])
            for k, v in result.rows.items()}
    pq.write_table(pa.table(rows), out / "matches.parquet")
    bands = band_table(result)
    pq.write_table(pa.Table.from_pylist(bands), out / "bands.parquet")
    pq.write_table(result.scores, out / "scores.parquet")
    if result.speed:
        pq.write_table(pa.Table.from_pylist(result.speed), out / "speed.parquet")

    def clean(value: Any) -> Any:
        if isinstance(value, float) and not math.isfinite(value):
            return None
        if isinstance(value, dict):
            return {k: clean(v) for k, v in value.items()}
        if isinstance(value, list):
            return [clean(v) for v in value]
        return value

    record = {"seconds": result.seconds, "goals": goal_table(result), "bands": bands, "noise": result.noise,
              "timings": result.timings, "speed": result.speed, "default_pipeline": default_pipeline_text(),
              "target_snr": TARGET_SNR, "snr_edges": list(SNR_EDGES)}
    (out / "accuracy.json").write_text(json.dumps(clean(record), indent=1) + "\n", encoding="utf-8")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", required=True, help="folder for the recordings and the results")
    parser.add_argument("--quick", action="store_true", help="shorter recordings (about a minute)")
    parser.add_argument("--seed", type=int, default=0, help="base seed of the simulations (default 0)")
    parser.add_argument("--no-speed", action="store_true", help="skip the throughput measurements")
    parser.add_argument("--repeat", type=int, default=2, help="repeats of each speed measurement (best kept)")
    args = parser.parse_args(argv)
    out = Path(args.out)
    result = run_accuracy(out / "recordings", QUICK if args.quick else FULL, args.seed,
                          log=lambda text: print(text, file=sys.stderr))
    if not args.no_speed:
        spikes = next(r for r in result.recordings if r.kind == "spike" and r.fs == 250e3)
        result.speed = measure_speed(spikes, args.repeat)
    write_results(result, out)
    print(format_report(result))
    print(f"\nresults: {out}")
    return 0


@pytest.mark.benchmark
def test_accuracy_benchmark(tmp_path):
    assert main(["--out", str(tmp_path / "accuracy"), "--repeat", "1"]) == 0


if __name__ == "__main__":
    sys.exit(main())
