"""The streaming runner: reader -> filters -> detector -> measures, chunk by chunk, files in parallel.

Memory stays bounded whatever the file length: the runner holds one chunk, the filters' own state, and a
history of filtered samples only as long as the detector's look-back plus the measures' context.

One file
    :func:`process_recording` streams one file and returns its events table and its ``files.parquet`` row.
Many files
    :func:`run` maps files over a process pool, writes one events part per file atomically, skips files
    already done by the same pipeline (resume), records failures without stopping, then runs the
    classifier over all events and writes ``files.parquet`` and ``run.json``.
"""

from __future__ import annotations

import json
import os
import platform
import shutil
import sys
import time
import traceback
from collections import deque
from collections.abc import Callable, Iterable, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field
from datetime import UTC, datetime
from glob import glob
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from . import __version__
from .errors import ImpactlineError, InputError
from .output import (
    CONTRACT_COLUMNS,
    EVENTS_DIR,
    FILE_COLUMNS,
    FILES_TABLE,
    LABELS_TABLE,
    RUN_JSON,
    SIZING_COLUMNS,
    file_fingerprint,
    part_name,
    read_events,
    read_part_metadata,
    schema_for,
    table_from_rows,
    write_json_atomic,
    write_table_atomic,
)
from .pipeline import Pipeline, parse_pipeline
from .robust import MAD_TO_SIGMA, row_medians
from .stages import Column, Event, EventWindow, FilterInfo, first_nonfinite

__all__ = ["EventBranch", "NoiseMeter", "chain_info", "chain_figures", "describe_error", "read_checked", "FileResult",
           "RunResult", "process_recording", "run", "expand_inputs", "events_schema"]

NOISE_BLOCK_SAMPLES = 1 << 16
#: Measured events are turned from row dicts into an Arrow table every this many rows: a dict per event
#: costs about ten times the columnar form, and a long file's events would otherwise grow memory with it.
ROW_BATCH = 4096


@dataclass
class FileResult:
    """Outcome of one input file."""

    row: dict[str, Any]
    events: pa.Table | None = None

    @property
    def ok(self) -> bool:
        return self.row["status"] in ("ok", "skipped")


@dataclass
class RunResult:
    """Outcome of a run over many files."""

    out_dir: Path | None
    files: pa.Table
    events: pa.Table
    pipeline_hash: str
    failed: list[str] = field(default_factory=list)

    @property
    def n_failed(self) -> int:
        return len(self.failed)


def events_schema(pipeline: Pipeline) -> pa.Schema:
    """The events schema a pipeline produces: contract columns, detector extras, measures, sizing."""
    columns: dict[str, Column] = dict(CONTRACT_COLUMNS)
    columns.update(pipeline.registry.get("detector", pipeline.detector_spec.name).cls.columns)
    for spec in pipeline.measure_specs:
        columns.update(pipeline.registry.get("measure", spec.name).cls.columns)
    if pipeline.sizing:
        columns.update(SIZING_COLUMNS)
    return schema_for(columns, {"impactline.pipeline_hash": pipeline.hash, "impactline.version": __version__})


# ------------------------------------------------------------------------------------------------ one file
class _History:
    """Filtered samples from absolute index ``start`` on, trimmed as events are measured."""

    def __init__(self) -> None:
        self.data = np.empty(0)
        self.start = 0

    @property
    def end(self) -> int:
        return self.start + self.data.size

    def append(self, samples: np.ndarray) -> None:
        self.data = np.concatenate([self.data, samples]) if self.data.size else samples.copy()

    def trim(self, keep_from: int) -> None:
        drop = min(max(0, keep_from - self.start), self.data.size)
        if drop:
            # A view is enough: the next append builds a new array and releases the old one.
            self.data = self.data[drop:]
            self.start += drop

    def get(self, start: int, end: int) -> np.ndarray:
        return self.data[start - self.start:end - self.start]


class NoiseMeter:
    """Robust rms noise of a stream: 1.4826 x MAD in fixed absolute blocks (every 8th sample), median over blocks.

    The MAD is about the block median, so events (a small fraction of samples) barely move it; blocks
    start at absolute multiples of the block length, so chunking cannot change the result.
    """

    def __init__(self, block: int = NOISE_BLOCK_SAMPLES):
        self.block = block
        self.pending = np.empty(0)
        self.estimates: list[float] = []

    def push(self, samples: np.ndarray) -> None:
        if self.pending.size:
            # Complete the pending block only, rather than copying the whole chunk behind it.
            need = self.block - self.pending.size
            head = np.concatenate([self.pending, samples[:need]])
            samples = samples[need:]
            if head.size < self.block:
                self.pending = head
                return
            self._measure_blocks(head)
        whole = (samples.size // self.block) * self.block
        if whole:
            self._measure_blocks(samples[:whole])
        self.pending = samples[whole:].copy()

    def _measure_blocks(self, data: np.ndarray) -> None:
        # Every 8th sample: the MAD of 8192 samples is within ~1 % of the full block's, at 1/8 the cost.
        blocks = data.reshape(-1, self.block)[:, ::8]
        centre = row_medians(blocks)
        self.estimates.extend((MAD_TO_SIGMA * row_medians(np.abs(blocks - centre[:, None]))).tolist())

    def result(self) -> float:
        estimates = list(self.estimates)
        if self.pending.size >= 1024 or not estimates and self.pending.size > 1:
            tail = self.pending
            estimates.append(float(MAD_TO_SIGMA * np.median(np.abs(tail - np.median(tail)))))
        return float(np.median(estimates)) if estimates else float("nan")


def _check_finite(samples: np.ndarray, first_index: int, path: Path) -> None:
    bad = first_nonfinite(samples)
    if bad is not None:
        raise InputError(path, f"sample is {samples[bad]} (not a finite number)",
                         "repair or trim the recording; impactline does not guess missing samples",
                         sample_index=first_index + bad)


class EventBranch:
    """Filters (optional), detector and measures fed with samples of one recording, chunk by chunk.

    :func:`process_recording` uses one branch; a comparison run feeds several branches from one read.

    Parameters
    ----------
    filters, detector, measures
        Stage instances (fresh for each recording).
    fs : float
        Sampling rate, Hz.
    path : Path
        The recording (for messages and the ``file`` column).
    schema : pyarrow.Schema
        Events schema (:func:`events_schema`).
    material : Material or None
        Sizing material (adds ``diameter_m``).
    chain : FilterInfo, optional
        Bandwidth of the whole filter chain feeding the detector (default: computed from ``filters``, and
        ``timing`` with it).
    noise : NoiseMeter, optional
        File-level noise meter (default: the branch's own, fed with its filtered samples).
    timing : PulseTiming, optional
        Onset timing of pulses through that chain, given with ``chain`` (None: no low-pass filter); see
        :func:`chain_figures`, which a comparison uses for branches fed samples already filtered.
    memo : dict, optional
        Shared by the detectors of branches fed the very same samples (see
        :meth:`impactline.stages.Detector.start_shared`); None for a branch on its own.
    """

    def __init__(self, filters, detector, measures, fs: float, path: Path, schema: pa.Schema, material=None,
                 chain: FilterInfo | None = None, noise: NoiseMeter | None = None, timing=None,
                 memo: dict | None = None):
        self.filters = list(filters)
        self.detector = detector
        self.measures = list(measures)
        self.fs = fs
        self.path = path
        self.schema = schema
        self.material = material
        try:
            self.filter_states = [f.start(fs) for f in self.filters]
            self.detector_state = detector.start(fs) if memo is None else detector.start_shared(fs, memo)
        except ValueError as exc:  # e.g. a cutoff above this file's Nyquist frequency
            raise InputError(path, str(exc), "lower the cutoff or check the file's sample rate") from None
        if chain is None:
            chain, timing = chain_info(self.filters, fs), pulse_timing(self.filters, fs)
        self.chain = chain
        contexts = [m.context_samples(fs) for m in self.measures]
        self.pre = max([c[0] for c in contexts], default=0)
        self.post = max([c[1] for c in contexts], default=0)
        self.lookback = int(detector.lookback_samples(fs))
        self.history = _History()
        # A comparison passes one meter shared by branches fed the very same samples.
        self.noise = noise if noise is not None else NoiseMeter()
        self.pending: deque[Event] = deque()
        self.rows: list[dict[str, Any]] = []
        self.tables: list[pa.Table] = []
        self.n_measured = 0
        self.state = {"last_start": None, "last_index": -1, "pulse_timing": timing}
        self.received = 0
        self.filtered = 0

    def push(self, samples: np.ndarray) -> None:
        """Feed the next chunk of input samples (A)."""
        self.push_filtered(self.filter_chunk(samples))

    def filter_chunk(self, samples: np.ndarray) -> np.ndarray:
        """Run the next chunk of input samples (A) through the filters only; return what they release."""
        self.received += samples.size
        for i, filt in enumerate(self.filters):
            samples, self.filter_states[i] = filt.process(samples, self.filter_states[i])
        self.noise.push(samples)   # the file's noise needs only the filtered samples: done on the filter side
        return samples

    def finish(self) -> pa.Table:
        """Drain filters and detector, measure the last events, return the events table."""
        tail = _flush_filters(self.filters, self.filter_states)
        self.noise.push(tail)
        self.push_filtered(tail)
        if self.filtered != self.received:
            raise ImpactlineError(f"{self.path}: the filters returned {self.filtered} samples for {self.received} "
                                  "read; a filter broke the stream contract")
        self._accept(self.detector.finish(self.detector_state))
        self._measure_ready(True)
        self._flush_rows()
        if not self.tables:
            return table_from_rows([], self.schema)
        return pa.concat_tables(self.tables).combine_chunks()

    def _flush_rows(self) -> None:
        """Move the measured rows into a table (sizing them in one vectorised call)."""
        if not self.rows:
            return
        if self.material is not None:
            from .physics import diameter_from_charge

            charges = np.array([row["charge_C"] for row in self.rows])
            for row, diameter in zip(self.rows, diameter_from_charge(charges, self.material), strict=True):
                row["diameter_m"] = float(diameter)
        self.tables.append(table_from_rows(self.rows, self.schema))
        self.rows = []

    def push_filtered(self, samples: np.ndarray) -> None:
        """Feed filtered samples (from :meth:`filter_chunk`, in order) to the detector and measures."""
        if samples.size == 0:
            return
        first = self.filtered
        self.history.append(samples)
        self.filtered += samples.size
        events, self.detector_state = self.detector.process(samples, first, self.detector_state)
        self._accept(events)
        self._measure_ready(False)
        keep_from = self.filtered - self.lookback - self.pre
        if self.pending:
            keep_from = min(keep_from, self.pending[0].start_index - self.pre)
        self.history.trim(keep_from)

    def _accept(self, events: list[Event]) -> None:
        name = self.detector.name
        for event in events:
            if not (self.state["last_index"] <= event.start_index < event.end_index <= self.filtered):
                raise ImpactlineError(
                    f"{self.path}: detector {name!r} broke its contract: event [{event.start_index}, "
                    f"{event.end_index}) is empty, out of order or beyond the {self.filtered} samples it was given")
            if event.start_index < self.history.start:
                raise ImpactlineError(
                    f"{self.path}: detector {name!r} reported an event starting at sample {event.start_index}, "
                    f"further back than its declared look-back of {self.lookback} samples")
            self.state["last_index"] = event.start_index
            self.pending.append(event)

    def _measure_ready(self, stream_done: bool) -> None:
        while self.pending and (stream_done or self.pending[0].end_index + self.post <= self.history.end):
            event = self.pending.popleft()
            self.rows.append(_measure_event(event, self.history, self.pre, self.post, self.fs, self.chain,
                                            self.measures, self.detector.name, str(self.path), self.n_measured,
                                            self.state, self.material))
            self.n_measured += 1
            if len(self.rows) >= ROW_BATCH:
                self._flush_rows()


def read_checked(recording, chunk_samples: int, path: Path, progress=None):
    """Yield the recording's chunks as float64, refusing non-finite samples (with their index)."""
    read = 0
    for chunk in recording.iter_chunks(chunk_samples):
        samples = np.asarray(chunk, dtype=np.float64)
        _check_finite(samples, read, path)
        read += samples.size
        yield samples
        if progress is not None:
            progress(read, recording.n_samples)
    if read == 0:
        raise InputError(path, "recording holds no samples", "check that the acquisition wrote data")


def _read_ahead(chunks: Iterable[np.ndarray], work: Callable[[np.ndarray], np.ndarray], depth: int = 2):
    """Yield ``work(chunk)`` for each chunk, computed by a second thread up to ``depth`` chunks ahead.

    Reading and filtering (numpy and scipy release the interpreter lock in their loops) then overlap the
    detector and measures working on the chunk before, on a second core. The results and their order are
    those of the plain loop; an exception in the thread is raised here, at the chunk where it happened.
    """
    import queue
    import threading

    done = object()
    results: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def hand_over(item) -> bool:
        # Never block for good: once the consumer has stopped (it raised, or was closed early), give up.
        while not stop.is_set():
            try:
                results.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def produce() -> None:
        try:
            for chunk in chunks:
                if not hand_over(work(chunk)):
                    return
            hand_over(done)
        except BaseException as exc:  # handed to the consumer, which raises it
            hand_over(exc)

    thread = threading.Thread(target=produce, name="impactline-read-ahead", daemon=True)
    thread.start()
    try:
        while True:
            item = results.get()
            if item is done:
                return
            if isinstance(item, BaseException):
                raise item
            yield item
    finally:
        stop.set()
        thread.join()


def process_recording(pipeline: Pipeline, path: str | Path, *,
                      progress: Callable[[int, int | None], None] | None = None,
                      read_ahead: bool = False) -> FileResult:
    """Stream one recording through the pipeline.

    Parameters
    ----------
    pipeline : Pipeline
        A loaded pipeline.
    path : path-like
        The recording.
    progress : callable, optional
        Called as ``progress(samples_done, n_samples_or_None)`` after each chunk.
    read_ahead : bool
        Read and filter the next chunk in a second thread while this one is detected and measured (same
        results; faster on a machine with a core to spare, so :func:`run` uses it when ``jobs`` is 1).

    Returns
    -------
    FileResult
        ``events`` (a table with :func:`events_schema`) and the ``files.parquet`` row.

    Raises
    ------
    InputError
        When the file cannot be read, with the file and sample index.
    """
    path = Path(path)
    started = time.perf_counter()
    reader = pipeline.build_reader(path)
    recording = reader.open(path)
    fs = float(recording.sample_rate_hz)
    material = pipeline.material()
    chain, timing = chain_figures(pipeline, fs)
    branch = EventBranch(pipeline.build_filters(), pipeline.build_detector(), pipeline.build_measures(), fs, path,
                         events_schema(pipeline), material, chain=chain, timing=timing)
    chunks = read_checked(recording, pipeline.chunk_samples, path, progress)
    if read_ahead:
        for filtered in _read_ahead(chunks, branch.filter_chunk):
            branch.push_filtered(filtered)
    else:
        for samples in chunks:
            branch.push(samples)
    table = branch.finish()
    row = _file_row(path, recording, reader.name, fs, branch.received, branch.received / fs, branch.noise.result(),
                    table, material, pipeline.hash, time.perf_counter() - started)
    row.update(filter_cutoff_hz=branch.chain.cutoff_hz, filter_rise_time_s=branch.chain.rise_time_s,
               filter_delay_s=branch.chain.delay_s)
    row.update(predicted_collision_rate(pipeline.collision_rate, row["median_diameter_m"], row["event_rate_per_s"]))
    return FileResult(row=row, events=table)


def chain_info(filters, fs: float) -> FilterInfo:
    if not filters:
        return FilterInfo(cutoff_hz=fs / 2, rise_time_s=None, delay_s=0.0)
    from .bandwidth import cascade_info

    return cascade_info(filters, fs)


def _flush_filters(filters, states) -> np.ndarray:
    """Drain the filters at the end of the stream: each filter's tail passes through the ones after it."""
    carry = np.empty(0)
    for i, filt in enumerate(filters):
        if carry.size:
            carry, states[i] = filt.process(carry, states[i])
        tail = filt.finish(states[i])
        carry = np.concatenate([carry, tail]) if carry.size else np.asarray(tail, dtype=np.float64)
    return carry


def _measure_event(event: Event, history: _History, pre: int, post: int, fs: float, chain: FilterInfo,
                   measures, detector_name: str, file: str, event_id: int, state: dict, material) -> dict[str, Any]:
    window_start = max(history.start, event.start_index - pre)
    window_end = min(history.end, event.end_index + post)
    signal = history.get(window_start, window_end)
    start = event.start_index - window_start
    end = event.end_index - window_start
    excursion = signal[start:end] - event.baseline_A
    rising = excursion if event.polarity > 0 else -excursion   # polarity applied (exact: a sign flip)
    peak_at = int(np.argmax(rising))
    peak = float(excursion[peak_at])
    delay_samples = (chain.delay_s or 0.0) * fs
    onset_index = event.start_index + _onset_offset(rising, event.noise_rms_A, fs, state.get("pulse_timing"))
    start_s = (event.start_index - delay_samples) / fs
    end_s = (event.end_index - delay_samples) / fs
    previous = state["last_start"]
    state["last_start"] = start_s
    noise = float(event.noise_rms_A)
    row: dict[str, Any] = {
        "file": file,
        "event_id": event_id,
        "start_s": start_s,
        "end_s": end_s,
        "onset_s": (onset_index - delay_samples) / fs,
        "duration_s": end_s - start_s,
        "start_index": int(round(event.start_index - delay_samples)),
        "end_index": int(round(event.end_index - delay_samples)),
        "baseline_A": float(event.baseline_A),
        "peak_A": peak,
        "charge_C": float(np.sum(excursion) / fs),
        "noise_rms_A": noise,
        "snr": abs(peak) / noise if noise > 0 else float("inf"),
        "inter_event_interval_s": start_s - previous if previous is not None else float("nan"),
        "detector": detector_name,
    }
    row.update(event.extras)
    window = EventWindow(signal=signal, window_start_index=window_start, start=start, end=end,
                         sample_rate_hz=fs, event=event, filter_info=chain)
    for measure in measures:
        values = measure.measure(window)
        missing = set(measure.columns) - set(values)
        if missing:
            raise ImpactlineError(f"measure {measure.name!r} did not return {sorted(missing)} for event "
                                  f"{event_id} of {file}; a measure must return every declared column")
        row.update({k: values[k] for k in measure.columns})
    return row


def predicted_collision_rate(settings: dict[str, Any] | None, median_diameter_m: float,
                             measured_rate_per_s: float) -> dict[str, float]:
    """Diffusion-limited collision rate at a disc for a ``[collision_rate]`` section, and measured/predicted.

    Uses the given particle diameter, else the file's median measured diameter; NaN when neither is known.
    """
    if not settings:
        return {}
    from .physics import collision_frequency_disc, stokes_einstein_diffusion

    diameter = settings.get("particle_diameter") or median_diameter_m
    if diameter is None or not np.isfinite(diameter):
        return {"diffusion_coefficient_m2_per_s": float("nan"), "predicted_rate_per_s": float("nan"),
                "rate_ratio": float("nan")}
    diffusion = float(stokes_einstein_diffusion(diameter / 2.0, settings["temperature"], settings.get("viscosity")))
    predicted = float(collision_frequency_disc(diffusion, settings["concentration"], settings["electrode_radius"]))
    return {"diffusion_coefficient_m2_per_s": diffusion, "predicted_rate_per_s": predicted,
            "rate_ratio": measured_rate_per_s / predicted}


#: Figures of each pipeline's filter chain by (pipeline hash, sample rate): the same for every file of a batch,
#: and tabulating the onset timing takes tens of milliseconds, much next to a short file.
_CHAIN_FIGURES: dict[tuple[str, float], tuple[FilterInfo, Any]] = {}


def chain_figures(pipeline: Pipeline, fs: float) -> tuple[FilterInfo, Any]:
    """Bandwidth (:func:`chain_info`) and onset timing (:func:`pulse_timing`) of ``pipeline``'s filters at
    ``fs`` (Hz), computed once per pipeline and sample rate in a process."""
    key = (pipeline.hash, float(fs))
    if key not in _CHAIN_FIGURES:
        filters = pipeline.build_filters()
        _CHAIN_FIGURES[key] = (chain_info(filters, fs), pulse_timing(filters, fs))
    return _CHAIN_FIGURES[key]


def pulse_timing(filters: Sequence, fs: float):
    """Half-height timing of pulses through ``filters`` at ``fs`` (Hz): a
    :class:`impactline.bandwidth.PulseTiming`, or None without a low-pass filter."""
    if not filters:
        return None
    from .bandwidth import PulseTiming

    return PulseTiming.from_filters(filters, fs)


def _onset_offset(rising: np.ndarray, noise_rms: float, fs: float, timing=None) -> float:
    """Samples from the event start to its onset: the half-height instant of its leading edge.

    The onset is the instant the event's current first reaches half of its first peak (the 50 % reference
    level instant of a transition, IEEE Std 181-2011; from memory); ``rising`` is the excursion from the event
    start on, polarity applied. A band-limited step is symmetric about its half-height point (exactly so for a
    zero-phase filter), so for an event longer than the chain's rise time the first crossing of half the
    filtered peak, minus the delay of causal filters, estimates it. The first peak, not the largest, is the
    reference, so a burst whose later sub-spikes are higher is timed at its first one
    (:func:`impactline.bandwidth.leading_edge`, shared with the ``waveform`` measure's ``edge`` alignment).
    A pulse shorter than about the rise time, or one that decays while the chain rises, peaks lower and its
    filtered edge crosses half of that peak early; ``timing`` (:class:`impactline.bandwidth.PulseTiming`, from
    the branch's filters) gives the lead of the crossing over the start from the observed width at half height
    and tail asymmetry. Without ``timing`` (no low-pass filter) the crossing itself is returned.
    """
    from .bandwidth import leading_edge

    edge = leading_edge(rising, noise_rms)
    if edge is None:
        return 0.0
    rise, width, asymmetry = edge.crossing, edge.width, edge.asymmetry
    return rise - timing.lead(width / fs, asymmetry) * fs if timing is not None else rise


def _file_row(path: Path, recording, reader_name: str, fs: float, n_samples: int, duration: float,
              noise_rms: float, table: pa.Table, material, pipeline_hash: str, seconds: float) -> dict[str, Any]:
    from .physics import poisson_rate_interval

    n_events = table.num_rows
    rate = poisson_rate_interval(n_events, duration)  # exact (Garwood 1936) 95 % interval
    median_diameter = float("nan")
    if material is not None and n_events:
        diameters = np.asarray(table.column("diameter_m").to_numpy(zero_copy_only=False), dtype=float)
        diameters = diameters[np.isfinite(diameters)]
        if diameters.size:
            median_diameter = float(np.median(diameters))
    return {
        "file": str(path),
        "fingerprint": file_fingerprint(path, recording.extra_files),
        "reader": reader_name,
        "sample_rate_hz": fs,
        "n_samples": n_samples,
        "duration_s": duration,
        "noise_rms_A": noise_rms,
        "n_events": n_events,
        "event_rate_per_s": n_events / duration,
        "event_rate_low_per_s": float(rate.low_per_s),
        "event_rate_high_per_s": float(rate.high_per_s),
        "median_diameter_m": median_diameter,
        "reader_metadata": json.dumps(recording.metadata, sort_keys=True, default=str),
        "status": "ok",
        "error": None,
        "seconds": seconds,
        "part": None,
        "pipeline_hash": pipeline_hash,
        # Not a files.parquet column: kept in the part metadata so resume can recompute the fingerprint.
        "extra_files": [str(p) for p in recording.extra_files],
    }


# ------------------------------------------------------------------------------------------------ many files
def expand_inputs(inputs: Iterable[str | Path], extensions: Iterable[str] | None = None) -> list[Path]:
    """Expand globs and folders into a sorted, de-duplicated list of files (sidecars excluded).

    Files named explicitly are always kept (so a bad one is reported); files found in a folder are kept only
    when their extension is in ``extensions`` (default: every installed reader's extensions).
    """
    if extensions is None:
        from .registry import default_registry

        extensions = {ext for entry in default_registry().stages("reader") for ext in entry.cls.extensions}
    extensions = set(extensions)
    found: list[Path] = []
    for item in inputs:
        text = str(item)
        if any(ch in text for ch in "*?["):
            matches = [Path(p) for p in sorted(glob(text, recursive=True))]
        elif Path(text).is_dir():
            matches = sorted(p for p in Path(text).iterdir() if p.is_file() and p.suffix.lower() in extensions)
        else:
            matches = [Path(text)]
        for match in matches:
            if match.is_dir() or match.name.endswith((".json", ".truth.parquet")) or match.name.startswith("."):
                continue
            found.append(match)
    unique: dict[str, Path] = {}
    for p in found:
        unique.setdefault(str(p.resolve()), p)
    return list(unique.values())


def reader_extensions(pipeline: Pipeline) -> set[str]:
    if pipeline.reader_spec.name != "auto":
        return set(pipeline.registry.get("reader", pipeline.reader_spec.name).cls.extensions)
    return {ext for entry in pipeline.registry.stages("reader") for ext in entry.cls.extensions}


def _failed_row(path: Path, error: str, pipeline_hash: str, seconds: float) -> dict[str, Any]:
    row = {name: None for name in FILE_COLUMNS}
    row.update(file=str(path), status="failed", error=error, pipeline_hash=pipeline_hash, seconds=seconds)
    return row


def describe_error(exc: BaseException) -> str:
    if isinstance(exc, (ImpactlineError, OSError, ValueError)):
        return str(exc)
    return f"{type(exc).__name__}: {exc}\n" + "".join(traceback.format_tb(exc.__traceback__)[-3:])


_WORKER_PIPELINE: Pipeline | None = None


def _worker_init(text: str, source: str, base_dir: str) -> None:
    global _WORKER_PIPELINE
    _WORKER_PIPELINE = parse_pipeline(text, source=source, base_dir=Path(base_dir))


def _process_and_write(pipeline: Pipeline, path: Path, out_dir: Path | None,
                       progress: Callable[[int, int | None], None] | None = None,
                       read_ahead: bool = False) -> FileResult:
    started = time.perf_counter()
    try:
        result = process_recording(pipeline, path, progress=progress, read_ahead=read_ahead)
    except Exception as exc:  # recorded in files.parquet; one bad file never stops the batch
        return FileResult(row=_failed_row(path, describe_error(exc), pipeline.hash, time.perf_counter() - started))
    if out_dir is not None:
        name = part_name(path)
        result.row["part"] = name
        metadata = dict(result.events.schema.metadata or {})
        metadata[b"impactline.file"] = json.dumps(result.row).encode()
        write_table_atomic(result.events.replace_schema_metadata(metadata), out_dir / EVENTS_DIR / name)
    return result


def _worker_task(path: str, out_dir: str | None) -> FileResult:
    assert _WORKER_PIPELINE is not None
    result = _process_and_write(_WORKER_PIPELINE, Path(path), Path(out_dir) if out_dir else None)
    if out_dir is not None:
        result.events = None  # the part is on disk; do not ship the table back through the pipe
    return result


def _done_before(path: Path, out_dir: Path, pipeline_hash: str) -> dict[str, Any] | None:
    """The stored row when ``path`` was already processed by this pipeline and is unchanged."""
    part = out_dir / EVENTS_DIR / part_name(path)
    stored = read_part_metadata(part)
    if not stored or stored.get("pipeline_hash") != pipeline_hash:
        return None
    try:
        extra_files = [Path(p) for p in stored.get("extra_files", [])]
        if any(not p.is_file() for p in extra_files):
            return None
        if file_fingerprint(path, extra_files) != stored.get("fingerprint"):
            return None
    except OSError:
        return None
    return stored


def prepare_run_folder(out_dir: Path, pipeline: Pipeline, overwrite: bool) -> None:
    """Create the run folder, refusing to mix results of different pipelines unless ``overwrite``."""
    run_json = out_dir / RUN_JSON
    if run_json.exists():
        try:
            previous = json.loads(run_json.read_text(encoding="utf-8")).get("pipeline_hash")
        except (OSError, json.JSONDecodeError):
            previous = None
        if previous != pipeline.hash:
            if not overwrite:
                raise ImpactlineError(
                    f"{out_dir} holds a run of a different pipeline (hash {str(previous)[:12]}, now "
                    f"{pipeline.hash[:12]}); choose another --out folder or pass --overwrite to replace it")
            for name in (EVENTS_DIR,):
                shutil.rmtree(out_dir / name, ignore_errors=True)
            for name in (FILES_TABLE, LABELS_TABLE, RUN_JSON):
                (out_dir / name).unlink(missing_ok=True)
    elif out_dir.exists() and any(out_dir.iterdir()) and not overwrite:
        raise ImpactlineError(f"{out_dir} exists and is not an impactline run folder; choose another --out "
                              "folder or pass --overwrite")
    (out_dir / EVENTS_DIR).mkdir(parents=True, exist_ok=True)


def run(pipeline: Pipeline, inputs: Sequence[str | Path], out_dir: str | Path | None = None, *, jobs: int = 1,
        resume: bool = True, overwrite: bool = False, command: Sequence[str] | None = None,
        on_file: Callable[[FileResult, int, int], None] | None = None,
        on_progress: Callable[[int, int | None], None] | None = None) -> RunResult:
    """Run a pipeline over many files.

    Parameters
    ----------
    pipeline : Pipeline
        A loaded pipeline.
    inputs : sequence of path-like
        Files, folders or glob patterns.
    out_dir : path-like, optional
        Run folder. Without it nothing is written and events are returned in memory.
    jobs : int
        Worker processes (1 = in this process).
    resume : bool
        Skip files already done by the same pipeline with an unchanged fingerprint.
    overwrite : bool
        Replace a run folder made by a different pipeline.
    command : sequence of str, optional
        Command line recorded in ``run.json``.
    on_file : callable, optional
        ``on_file(result, done, total)`` after each file.
    on_progress : callable, optional
        ``on_progress(samples_done, n_samples)`` within a file (single-process runs only).

    Returns
    -------
    RunResult
    """
    started_at = datetime.now(UTC)
    paths = expand_inputs(inputs, reader_extensions(pipeline))
    out = Path(out_dir) if out_dir is not None else None
    if out is not None:
        prepare_run_folder(out, pipeline, overwrite)
    results: list[FileResult] = []
    todo: list[Path] = []
    for path in paths:
        stored = _done_before(path, out, pipeline.hash) if (out is not None and resume) else None
        if stored is not None:
            stored["status"] = "skipped"
            results.append(FileResult(row=stored))
            if on_file:
                on_file(results[-1], len(results), len(paths))
        else:
            todo.append(path)

    if jobs <= 1 or len(todo) <= 1:
        for path in todo:
            # One file at a time: a second thread reads and filters ahead (with --jobs the cores are taken).
            results.append(_process_and_write(pipeline, path, out, progress=on_progress, read_ahead=True))
            if on_file:
                on_file(results[-1], len(results), len(paths))
    else:
        base_dir = str(Path(pipeline.source).resolve().parent) if Path(pipeline.source).exists() else os.getcwd()
        with ProcessPoolExecutor(max_workers=jobs, initializer=_worker_init,
                                 initargs=(pipeline.text, pipeline.source, base_dir)) as pool:
            futures = {pool.submit(_worker_task, str(p), str(out) if out else None): p for p in todo}
            for future in as_completed(futures):
                try:
                    result = future.result()
                except Exception as exc:  # a worker died (e.g. out of memory): record, keep going
                    result = FileResult(row=_failed_row(futures[future], describe_error(exc), pipeline.hash, 0.0))
                results.append(result)
                if on_file:
                    on_file(result, len(results), len(paths))

    order = {str(p): i for i, p in enumerate(paths)}
    results.sort(key=lambda r: order.get(r.row["file"], len(order)))
    files_table = table_from_rows([r.row for r in results], schema_for(FILE_COLUMNS, {
        "impactline.pipeline_hash": pipeline.hash}))
    if out is not None:
        write_table_atomic(files_table, out / FILES_TABLE)
        has_parts = any((out / EVENTS_DIR).glob("[!._]*.parquet"))
        events = read_events(out) if has_parts else events_schema(pipeline).empty_table()
    else:
        tables = [r.events for r in results if r.events is not None]
        events = pa.concat_tables(tables) if tables else events_schema(pipeline).empty_table()
    events = _classify(pipeline, events, out)
    if out is not None:
        write_json_atomic(_run_record(pipeline, paths, command, started_at, results), out / RUN_JSON)
    failed = [r.row["file"] for r in results if r.row["status"] == "failed"]
    return RunResult(out_dir=out, files=files_table, events=events, pipeline_hash=pipeline.hash, failed=failed)


def _classify(pipeline: Pipeline, events: pa.Table, out: Path | None) -> pa.Table:
    classifier = pipeline.build_classifier()
    if classifier is None or events.num_rows == 0:
        return events
    for name in list(classifier.columns):
        if name in events.column_names:
            events = events.drop_columns([name])
    labels = classifier.fit_predict(events)
    columns = {"file": CONTRACT_COLUMNS["file"], "event_id": CONTRACT_COLUMNS["event_id"], **classifier.columns}
    rows = {"file": events.column("file"), "event_id": events.column("event_id")}
    schema = schema_for(columns, {"impactline.pipeline_hash": pipeline.hash, "impactline.classifier": classifier.name})
    arrays = [rows["file"], rows["event_id"]] + [pa.array(np.asarray(labels[name]), type=schema.field(name).type)
                                                for name in classifier.columns]
    label_table = pa.Table.from_arrays(arrays, schema=schema)
    if out is not None:
        write_table_atomic(label_table, out / LABELS_TABLE)
    for name in classifier.columns:
        events = events.append_column(schema.field(name), label_table.column(name))
    return events


def package_versions() -> dict[str, str | None]:
    """Versions of the packages that shape results, for run records (None when not installed)."""
    import importlib.metadata as md

    versions: dict[str, str | None] = {}
    for package in ("numpy", "scipy", "pyarrow", "pywavelets", "scikit-learn", "pluggy", "h5py"):
        try:
            versions[package] = md.version(package)
        except md.PackageNotFoundError:
            versions[package] = None
    return versions


def _run_record(pipeline: Pipeline, paths: list[Path], command, started_at: datetime,
                results: list[FileResult]) -> dict[str, Any]:
    return {
        "impactline_version": __version__,
        "pipeline_source": pipeline.source,
        "pipeline_text": pipeline.text,
        "pipeline_hash": pipeline.hash,
        "pipeline_resolved": pipeline.resolved(),
        "plugins": pipeline.registry.plugin_versions,
        "packages": package_versions(),
        "python": sys.version,
        "platform": platform.platform(),
        "command": list(command) if command is not None else None,
        "inputs": [str(p) for p in paths],
        "started": started_at.isoformat(),
        "finished": datetime.now(UTC).isoformat(),
        "files_ok": sum(r.row["status"] == "ok" for r in results),
        "files_skipped": sum(r.row["status"] == "skipped" for r in results),
        "files_failed": sum(r.row["status"] == "failed" for r in results),
    }
