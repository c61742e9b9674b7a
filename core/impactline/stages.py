"""The five stage kinds and their contracts.

Every stage is a class with four pieces of class data (``name``, ``kind``, ``summary``, ``params``) and
the methods of its kind. The constructor only validates and stores keyword parameters (as attributes of
the same name); work happens in the kind's methods, with explicit state so a long recording can be
processed in chunks.

Kinds
-----
reader
    ``open(path) -> Recording``; the recording yields float64 chunks in amperes (anodic positive).
filter
    ``start(fs) -> state``; ``process(x, state) -> (y, state)``; ``finish(state) -> y``. A filter may hold
    samples back (``len(y) < len(x)``) but over the whole stream emits exactly as many samples as it
    received, aligned with its input (sample ``i`` out corresponds to sample ``i`` in).
detector
    ``start(fs) -> state``; ``process(x, first_index, state) -> (events, state)``; ``finish(state) ->
    events``. Every event is emitted once, whole, whatever the chunking.
measure (feature extractor)
    ``measure(window) -> dict`` of the columns it declares, for one event and its context.
classifier
    ``fit_predict(events) -> dict`` of the columns it declares, over all events of a run.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from .params import Param, resolve_params

__all__ = [
    "KINDS",
    "Column",
    "Stage",
    "Recording",
    "Reader",
    "Filter",
    "FilterInfo",
    "Event",
    "Detector",
    "EventWindow",
    "FeatureExtractor",
    "Classifier",
    "first_nonfinite",
]

def first_nonfinite(samples: np.ndarray) -> int | None:
    """Index of the first NaN or infinite value of a 1-D array of samples; None when all are finite.

    Stages pass finite currents to each other, so readers, the runner and detectors check every chunk:
    NaN or inf anywhere makes the sum non-finite, so one reduction (no temporary mask) clears the usual
    chunk, and only a non-finite sum, which huge finite values could also give, is checked sample by sample.
    """
    with np.errstate(over="ignore", invalid="ignore"):
        total = float(np.add.reduce(samples))
    if math.isfinite(total):
        return None
    finite = np.isfinite(samples)
    return None if finite.all() else int(np.argmin(finite))


#: Stage kinds, in pipeline order.
KINDS: tuple[str, ...] = ("reader", "filter", "detector", "measure", "classifier")

#: Column types a stage may declare (Arrow type names).
COLUMN_TYPES: tuple[str, ...] = ("float64", "float32", "int64", "int32", "bool", "string", "list<float32>")


@dataclass(frozen=True)
class Column:
    """Declaration of one output column.

    Parameters
    ----------
    dtype : str
        One of ``float64``, ``float32``, ``int64``, ``int32``, ``bool``, ``string``, ``list<float32>``.
    unit : str
        SI unit (written to the Parquet field metadata); empty if dimensionless.
    doc : str
        One line for docs and listings.
    length : int, optional
        Fixed length of a ``list<float32>`` column.
    """

    dtype: str
    unit: str = ""
    doc: str = ""
    length: int | None = None


class Stage:
    """Base of all stages: declared parameters, validated once in the constructor.

    Subclasses set ``name``, ``kind``, ``summary``, ``params`` (and ``version``). Parameter values are
    available as attributes: ``Bessel(cutoff="20 kHz").cutoff == 20000.0``.
    """

    name: ClassVar[str] = ""
    kind: ClassVar[str] = ""
    summary: ClassVar[str] = ""
    version: ClassVar[str] = "0"
    params: ClassVar[dict[str, Param]] = {}

    def __init__(self, **values: Any):
        resolved = resolve_params(f"{self.kind} {self.name!r}", self.params, values)
        for key, value in resolved.items():
            setattr(self, key, value)
        self._param_values = resolved

    def get_params(self) -> dict[str, Any]:
        """Return the resolved parameter values (SI units)."""
        return dict(self._param_values)

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self._param_values.items())
        return f"{type(self).__name__}({args})"


# --------------------------------------------------------------------------------------------------- readers
@dataclass
class Recording:
    """An opened recording: its facts and a way to stream its samples.

    Parameters
    ----------
    path : Path
        The data file.
    sample_rate_hz : float
        Sampling rate, Hz.
    n_samples : int or None
        Number of samples if known before reading (None for e.g. delimited text).
    iter_chunks : callable
        ``iter_chunks(chunk_samples)`` yields 1-D float64 arrays of current in A (anodic positive), in
        order, each at most ``chunk_samples`` long. Reading must stay bounded in memory.
    metadata : dict
        Anything worth recording (dtype, gain, dataset path, header lines...). JSON-serialisable.
    extra_files : list of Path
        Other files whose content defines the recording (e.g. a sidecar); part of the fingerprint.
    """

    path: Path
    sample_rate_hz: float
    n_samples: int | None
    iter_chunks: Callable[[int], Iterator[np.ndarray]]
    metadata: dict[str, Any] = field(default_factory=dict)
    extra_files: list[Path] = field(default_factory=list)


class Reader(Stage):
    """Reads one file format into a :class:`Recording`.

    Subclasses declare ``extensions`` (lower case, with dot) and may override :meth:`sniff` to
    recognise their content. The three parameters below are common to every reader; when one is not
    set in the pipeline file, the reader takes it from the file itself or its ``NAME.json`` sidecar
    (see :mod:`impactline.sidecar`), and a value in the pipeline file wins.
    """

    kind: ClassVar[str] = "reader"
    extensions: ClassVar[tuple[str, ...]] = ()
    params: ClassVar[dict[str, Param]] = {
        "sample_rate": Param(None, unit="Hz", low=0, low_inclusive=False,
                             doc="sampling rate; default: from the file or its sidecar"),
        "gain": Param(None, unit="A", doc="amperes per raw count; default: file or sidecar (integer data needs one)"),
        "offset": Param(None, unit="A", doc="added after scaling by gain; default: sidecar or 0"),
    }

    @classmethod
    def sniff(cls, path: Path, head: bytes) -> bool:
        """Return True when ``head`` (the first 4 KiB of ``path``) looks like this reader's format."""
        return False

    def open(self, path: Path) -> Recording:  # pragma: no cover - abstract
        """Open ``path`` (checking header and sidecar) and return a :class:`Recording`.

        Raises
        ------
        impactline.errors.InputError
            With the file, the key and the fix, when the file cannot be read as this format.
        """
        raise NotImplementedError


# --------------------------------------------------------------------------------------------------- filters
@dataclass(frozen=True)
class FilterInfo:
    """What a filter does to a pulse, for reporting and for compensating event times.

    Parameters
    ----------
    cutoff_hz : float or None
        -3 dB frequency of the magnitude response (None if the filter is not a low-pass).
    rise_time_s : float or None
        10-90 % step-response rise time.
    delay_s : float
        Delay the filter adds to event times (0 for zero-phase filters); subtracted from reported times.
    """

    cutoff_hz: float | None = None
    rise_time_s: float | None = None
    delay_s: float = 0.0


class Filter(Stage):
    """A streaming transform of the current signal (A in, A out)."""

    kind: ClassVar[str] = "filter"

    def start(self, sample_rate_hz: float) -> Any:
        """Return the initial state for a stream sampled at ``sample_rate_hz``; validate against Nyquist."""
        raise NotImplementedError

    def process(self, x: np.ndarray, state: Any) -> tuple[np.ndarray, Any]:
        """Filter the next chunk. Return the next output samples (possibly fewer) and the new state."""
        raise NotImplementedError

    def finish(self, state: Any) -> np.ndarray:
        """Return the output samples still held back at the end of the stream."""
        raise NotImplementedError

    def info(self, sample_rate_hz: float) -> FilterInfo:
        """Describe the filter's bandwidth, rise time and delay at this sampling rate."""
        return FilterInfo()

    def frequency_response(self, freqs_hz: np.ndarray, sample_rate_hz: float) -> np.ndarray | None:
        """Complex response at ``freqs_hz`` (None if not linear); used for the cascade bandwidth."""
        return None


# --------------------------------------------------------------------------------------------------- detectors
@dataclass
class Event:
    """One detected event, in absolute sample indices of the filtered stream.

    Parameters
    ----------
    start_index : int
        First sample of the event.
    end_index : int
        One past the last sample (so duration is ``(end_index - start_index) / fs``).
    baseline_A : float
        Baseline current under the event, A.
    noise_rms_A : float
        Local rms noise, A.
    polarity : int
        +1 for an anodic (positive) excursion, -1 for cathodic.
    extras : dict
        Values of the detector's own declared columns (e.g. ``step_height_A``).
    """

    start_index: int
    end_index: int
    baseline_A: float
    noise_rms_A: float
    polarity: int = 1
    extras: dict[str, Any] = field(default_factory=dict)


class Detector(Stage):
    """Finds events in a continuous stream of filtered samples."""

    kind: ClassVar[str] = "detector"
    #: Extra columns the detector fills through :attr:`Event.extras`.
    columns: ClassVar[dict[str, Column]] = {}

    def start(self, sample_rate_hz: float) -> Any:
        """Return the initial state."""
        raise NotImplementedError

    def start_shared(self, sample_rate_hz: float, memo: dict) -> Any:
        """Return the initial state of a stream whose samples other detectors also receive.

        ``memo`` is one dict per stream, shared by every detector fed the very same samples (the variants of
        a comparison after the same filters). A detector may keep there results that depend only on the
        samples and on the settings it puts in their key (start keys with its name), so that another
        detector with those settings reuses them instead of computing them again. Events must be the same,
        bit for bit, as with :meth:`start`. The default ignores ``memo``.
        """
        return self.start(sample_rate_hz)

    def process(self, x: np.ndarray, first_index: int, state: Any) -> tuple[list[Event], Any]:
        """Consume the next chunk (``x[0]`` has absolute index ``first_index``).

        Return the events completed so far (each exactly once) and the new state.
        """
        raise NotImplementedError

    def finish(self, state: Any) -> list[Event]:
        """Return the events still open or pending at the end of the stream."""
        raise NotImplementedError

    def lookback_samples(self, sample_rate_hz: float) -> int:
        """Largest distance from the newest input sample back to the start of an event not yet emitted.

        The runner keeps this many filtered samples (plus measurement context) so events can be measured.
        """
        raise NotImplementedError


# --------------------------------------------------------------------------------------------------- measures
@dataclass
class EventWindow:
    """One event and its context, handed to feature extractors.

    Parameters
    ----------
    signal : ndarray
        Filtered current, A, from ``window_start_index`` on (includes pre- and post-event context,
        clipped at the ends of the recording).
    window_start_index : int
        Absolute index of ``signal[0]``.
    start, end : int
        Event bounds as indices into ``signal`` (``end`` exclusive).
    sample_rate_hz : float
        Sampling rate, Hz.
    event : Event
        The detector's event (baseline, noise, polarity, extras).
    filter_info : FilterInfo
        Effective bandwidth, rise time and delay of the whole filter chain.
    """

    signal: np.ndarray
    window_start_index: int
    start: int
    end: int
    sample_rate_hz: float
    event: Event
    filter_info: FilterInfo

    @property
    def excursion(self) -> np.ndarray:
        """Event samples minus the baseline, A."""
        return self.signal[self.start:self.end] - self.event.baseline_A


class FeatureExtractor(Stage):
    """Measures each event; declares the columns it fills."""

    kind: ClassVar[str] = "measure"
    columns: ClassVar[dict[str, Column]] = {}

    def context_samples(self, sample_rate_hz: float) -> tuple[int, int]:
        """Samples of context wanted before and after each event."""
        return (0, 0)

    def measure(self, window: EventWindow) -> Mapping[str, Any]:
        """Return a value for every declared column (NaN where undefined)."""
        raise NotImplementedError


# --------------------------------------------------------------------------------------------------- classifiers
class Classifier(Stage):
    """Labels or clusters all events of a run at once (after every file is measured)."""

    kind: ClassVar[str] = "classifier"
    columns: ClassVar[dict[str, Column]] = {}

    def fit_predict(self, events: Any) -> Mapping[str, np.ndarray]:
        """Given the run's events (a ``pyarrow.Table``), return one array per declared column."""
        raise NotImplementedError
