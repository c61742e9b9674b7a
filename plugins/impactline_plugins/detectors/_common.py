"""Pieces shared by the bundled detectors: a sample buffer in absolute indices, chunk checks, and a helper
that streams an array through a detector in chunks (robust noise estimates come from :mod:`impactline.robust`
and are re-exported here).

Chunk invariance rests on one rule: every estimate a detector makes depends only on absolute sample
positions (fixed blocks counted from the first sample of the stream), never on where a chunk happened to
end. The buffer below lets a detector wait for whole blocks whatever the chunk sizes.
"""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np
from impactline import Detector, Event
from impactline.robust import MAD_TO_SIGMA, median, robust_sigma
from impactline.stages import first_nonfinite

__all__ = ["MAD_TO_SIGMA", "SampleBuffer", "check_chunk", "detect_array", "median", "robust_sigma",
           "signature"]


def check_chunk(detector: str, x: np.ndarray, first_index: int, expected_index: int | None) -> np.ndarray:
    """Return ``x`` as a 1-D float64 array after checking contiguity and finiteness.

    Raises
    ------
    ValueError
        Naming the detector and the absolute sample index, when a chunk is not 1-D, does not follow the
        previous one, or holds NaN/inf.
    """
    x = np.asarray(x, dtype=np.float64)
    if x.ndim != 1:
        raise ValueError(f"detector {detector!r}: expected a 1-D chunk of samples, got shape {x.shape}")
    if expected_index is not None and first_index != expected_index:
        raise ValueError(
            f"detector {detector!r}: chunks must be contiguous; expected first_index {expected_index}, "
            f"got {first_index}. Fix: pass every chunk of the stream, in order"
        )
    offset = first_nonfinite(x)
    if offset is not None:
        bad = first_index + offset
        raise ValueError(
            f"detector {detector!r}: sample {bad} is {float(x[bad - first_index])}; expected a finite "
            "current in A. Fix: repair or cut the recording there (a reader or filter produced it)"
        )
    return x


class SampleBuffer:
    """Growable window of a stream, addressed by absolute sample index.

    Appending is amortised O(1) per sample: the storage doubles when full and live samples are moved to
    the front only when that frees at least half of it. Views returned by :meth:`view` are valid until
    the next :meth:`append`.

    Parameters
    ----------
    origin : int
        Absolute index of the first sample that will be appended.
    """

    def __init__(self, origin: int = 0):
        self._data = np.empty(0, dtype=np.float64)
        self._lo = 0
        self._hi = 0
        #: Absolute index of the oldest sample held.
        self.start = origin

    @property
    def end(self) -> int:
        """Absolute index one past the newest sample held."""
        return self.start + self._hi - self._lo

    def append(self, x: np.ndarray) -> None:
        """Add samples at the end."""
        n = len(x)
        if self._hi + n > len(self._data):
            live = self._hi - self._lo
            if live + n <= len(self._data) // 2:
                self._data[:live] = self._data[self._lo:self._hi]
            else:
                grown = np.empty(max(2 * (live + n), 4096), dtype=np.float64)
                grown[:live] = self._data[self._lo:self._hi]
                self._data = grown
            self._lo, self._hi = 0, live
        self._data[self._hi:self._hi + n] = x
        self._hi += n

    def view(self, a: int, b: int) -> np.ndarray:
        """Samples with absolute indices ``a`` to ``b`` (exclusive); both must lie inside the buffer."""
        if a < self.start or b > self.end or a > b:
            raise IndexError(f"samples [{a}, {b}) not in buffer [{self.start}, {self.end})")
        return self._data[self._lo + a - self.start:self._lo + b - self.start]

    def discard_before(self, a: int) -> None:
        """Forget samples with absolute index below ``a``."""
        drop = min(a, self.end) - self.start
        if drop > 0:
            self._lo += drop
            self.start += drop


def detect_array(detector: Detector, x: np.ndarray, sample_rate_hz: float,
                 chunk_samples: int | Iterable[int] | None = None, first_index: int = 0,
                 check_contract: bool = False) -> list[Event]:
    """Run ``detector`` over the samples ``x`` fed in chunks and return all its events in order.

    Parameters
    ----------
    detector : Detector
        The detector stage.
    x : ndarray
        Filtered current, A.
    sample_rate_hz : float
        Sampling rate, Hz.
    chunk_samples : int or iterable of int, optional
        Chunk length (or successive lengths, cycled) fed to ``process``; None feeds the whole array.
    first_index : int
        Absolute index of ``x[0]``.
    check_contract : bool
        Also check the detector contract as the stream goes: events come in increasing start order,
        lie inside the stream, and each starts no further back than ``lookback_samples`` from the newest
        sample of the call before the one that emitted it.

    Returns
    -------
    list of Event

    Raises
    ------
    AssertionError
        When ``check_contract`` is set and the detector breaks its contract (the message says how).
    """
    state = detector.start(sample_rate_hz)
    lookback = detector.lookback_samples(sample_rate_hz)
    events: list[Event] = []
    if chunk_samples is None:
        sizes = [max(len(x), 1)]
    elif isinstance(chunk_samples, int):
        sizes = [chunk_samples]
    else:
        sizes = [int(s) for s in chunk_samples]
    newest = None  # newest absolute index fed before the current call

    def accept(new: list[Event]) -> None:
        for event in new:
            if check_contract:
                where = f"{detector.name}: event [{event.start_index}, {event.end_index})"
                assert first_index <= event.start_index < event.end_index <= first_index + len(x), (
                    f"{where} is empty or outside the stream [{first_index}, {first_index + len(x)})")
                assert not events or event.start_index >= events[-1].start_index, (
                    f"{where} comes after an event starting at {events[-1].start_index}")
                assert newest is None or newest - event.start_index <= lookback, (
                    f"{where} was emitted after sample {newest} had been fed: further back than "
                    f"lookback_samples = {lookback}")
            events.append(event)

    pos, turn = 0, 0
    while pos < len(x):
        size = sizes[turn % len(sizes)]
        turn += 1
        new, state = detector.process(x[pos:pos + size], first_index + pos, state)
        accept(new)
        pos += size
        newest = first_index + min(pos, len(x)) - 1
    accept(detector.finish(state))
    return events


def signature(events: Iterable[Event]) -> list[tuple]:
    """Everything an event carries, as plain tuples, for exact (bit-for-bit) comparison of event lists."""
    return [(e.start_index, e.end_index, e.baseline_A, e.noise_rms_A, e.polarity,
             tuple(sorted(e.extras.items()))) for e in events]
