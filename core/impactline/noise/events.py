"""Keeping events out of the noise spectrum: the noise is measured between events.

On a collision recording the events (nA for a millisecond, a few per second) carry far more power than the
pA noise, so a plain Welch average describes the events, not the noise. Here the segments that hold an
event are left out of the average. Three streaming passes over the recording (a file is read three times):

1. **Noise scale.** The recording is cut into blocks of ``block_samples`` (the requested Welch segment) on
   the absolute sample grid. Each block gives its median ``c_b`` and a robust spread
   ``s_b = 1.4826 MAD`` (median absolute deviation from the median; ``1.4826 = 1 / Phi^-1(3/4)`` makes it
   the standard deviation of Gaussian noise; Hampel 1974, J. Am. Stat. Assoc. 69:383). An event fills a
   few milliseconds of a block of a quarter second, so it barely moves ``c_b`` or ``s_b``. The reference
   ``sigma_b`` of each block is the median of ``s`` over the block and its 8 neighbours on each side: a few
   blocks crowded with events (or holding a step) do not raise it, and a noise level that changes over
   seconds is followed. No first guess of the noise is needed.
2. **Excursions.** A sample is part of an excursion when ``|x - c_b| > k sigma_b`` (``k`` = ``threshold``,
   default 6: Gaussian noise passes it once in 5e8 samples). The excursion is widened, with hysteresis,
   to the run of samples around it with ``|x - c_b| > k_r sigma_b`` (``k_r`` = 2), so the onset and the
   tail of an event go with it. The same is done, with their own ``c_b`` and ``sigma_b``, on the means of
   8, 64 and 512 consecutive samples (while a block holds at least 64 such means): broadband noise
   dominated by high frequencies averages down there, so long, low events (a step of a third of the noise
   rms, the slow tail of a spike) stand out, and the tails are followed further. The excursions of all
   averaging lengths are joined.
3. **Welch's average** of the segments that overlap no excursion
   (:class:`impactline.noise.spectrum.WelchAccumulator` with ``exclude=``).

Segment length. At a few events per second, most quarter-second segments hold one; shorter segments stay
clean more often. With the default segment, the length is halved (down to 1/64 of it, and not below 256
samples) until at least 16 segments (or as many as the recording has) are clean: a resolution of a few tens
of Hz measured between events is worth more than a fine one measured on events. A segment the user gives is
kept as given.

Why not the median of the periodograms (``scipy.signal.welch(..., average="median")``)? It is robust only
while fewer than half of the segments at each frequency are contaminated. At 5 events per second about
three quarters of the quarter-second segments hold an event, and the median spectrum is then still an
event spectrum: 700 times the noise floor between 1 and 10 kHz on the simulator's default recording.

Memory: a partial block and one chunk per averaging length, two numbers per block (16 bytes per quarter
second and averaging length) and two per excursion. Everything is decided on the absolute sample grid
(blocks, means, samples, segments) and state (a partial block or mean, an open excursion) is carried from
chunk to chunk, so the result does not depend on the chunk size.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field

import numpy as np

from ..robust import MAD_TO_SIGMA
from .spectrum import overlaps_intervals

__all__ = [
    "EVENT_MODES",
    "EventExclusion",
    "BlockScale",
    "ExcursionFinder",
    "reference_scale",
    "merge_intervals",
    "scales_for",
    "excluded_segments",
    "choose_segment",
    "find_events",
]

EVENT_MODES = ("exclude", "keep")
#: Excursion threshold, robust standard deviations from the block median.
DEFAULT_THRESHOLD_SIGMA = 6.0
#: An excursion extends while the samples stay beyond this many standard deviations (hysteresis).
DEFAULT_RELEASE_SIGMA = 2.0
#: Neighbouring blocks on each side in the running median of the block spreads.
SCALE_HALF_WINDOW = 8
#: Clean segments wanted before the default segment is shortened.
MIN_CLEAN_SEGMENTS = 16
#: The default segment is shortened at most by this factor, and never below MIN_SEGMENT_SAMPLES.
MAX_SHORTENING = 64
MIN_SEGMENT_SAMPLES = 256
#: Averaging lengths (samples) at which excursions are sought: the samples themselves catch short events
#: (a few microseconds), means over 8-512 samples bring out long, low events (steps, slow tails) that sit
#: below the threshold in broadband noise dominated by high frequencies.
SCALES = (1, 8, 64, 512)
#: Samples of a block used for its median and spread (evenly spaced on the absolute grid): 16384 samples
#: give the spread to about 1 %, at a quarter of the cost for the default block at 250 kHz.
_SCALE_POINTS = 16384


@dataclass
class EventExclusion:
    """How events were kept out of a spectrum, and how much was left out.

    Attributes
    ----------
    mode : {"exclude", "keep"}
        "keep": events were averaged in (nothing below is measured; counts are zero, sigma NaN).
    threshold_sigma, release_sigma : float
        ``k`` and ``k_r`` of the excursion rule (robust standard deviations).
    sigma_A : float
        Median of the blocks' robust noise standard deviations, A.
    block_samples : int
        Block length of the noise scale, samples.
    n_samples : int
        Samples scanned.
    sample_rate_hz : float
        Sampling rate, Hz.
    starts, ends : ndarray of int
        Excursions ``[start, end)``, absolute sample indices.
    segment_requested : int
        Welch segment asked for (or the default), samples.
    segment_used : int
        Welch segment used (shorter when too few segments were clean), samples.
    candidates : list of (int, int, int)
        ``(segment samples, segments, clean segments)`` of each length tried.
    averaging_samples : tuple of int
        Averaging lengths at which excursions were sought, samples.
    sigma_by_scale_A : tuple of float
        Median robust standard deviation of the means at each averaging length, A.
    """

    mode: str
    threshold_sigma: float = DEFAULT_THRESHOLD_SIGMA
    release_sigma: float = DEFAULT_RELEASE_SIGMA
    sigma_A: float = math.nan
    block_samples: int = 0
    n_samples: int = 0
    sample_rate_hz: float = math.nan
    starts: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64), repr=False)
    ends: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64), repr=False)
    segment_requested: int = 0
    segment_used: int = 0
    candidates: list[tuple[int, int, int]] = field(default_factory=list)
    averaging_samples: tuple[int, ...] = ()
    sigma_by_scale_A: tuple[float, ...] = ()

    @property
    def n_excursions(self) -> int:
        """Excursions found (an event, or events whose excursions touch or overlap, count once)."""
        return len(self.starts)

    @property
    def event_samples(self) -> int:
        """Samples inside excursions."""
        return int(np.sum(self.ends - self.starts))

    @property
    def event_time_s(self) -> float:
        """Time inside excursions, s."""
        return self.event_samples / self.sample_rate_hz if self.n_samples else 0.0

    @property
    def event_fraction(self) -> float:
        """Share of the scanned samples inside excursions."""
        return self.event_samples / self.n_samples if self.n_samples else 0.0

    @property
    def shortened(self) -> bool:
        """True when the segment was shortened to keep enough clean segments."""
        return self.segment_used != self.segment_requested

    @property
    def intervals(self) -> tuple[np.ndarray, np.ndarray]:
        """``(starts, ends)`` for :class:`impactline.noise.spectrum.WelchAccumulator`'s ``exclude``."""
        return self.starts, self.ends


def _robust_centre_scale(values: np.ndarray) -> tuple[float, float]:
    """Median and 1.4826 MAD (falls back on the rms deviation from the median when the MAD is 0, as for
    coarsely quantised data, and is 0 only for a constant block)."""
    centre = float(np.median(values))
    dev = np.abs(values - centre)
    scale = MAD_TO_SIGMA * float(np.median(dev))
    if scale == 0.0:
        scale = float(np.sqrt(np.mean(dev ** 2)))
    return centre, scale


def _chain(m: int) -> tuple[int, ...]:
    """Averaging lengths from 1 to ``m`` in steps of 8 (then the rest): means of 64 are means of 8 means of 8."""
    lengths = [1]
    while lengths[-1] < m:
        step = 8 if (m // lengths[-1]) % 8 == 0 else m // lengths[-1]
        lengths.append(lengths[-1] * step)
    if lengths[-1] != m:
        raise ValueError(f"averaging length must be a positive whole number, got {m!r}")
    return tuple(lengths)


class _Pyramid:
    """Means of consecutive groups of ``m`` samples on the absolute grid, for several ``m`` at once.

    Each length is averaged from the next shorter one (a mean of 512 samples is the mean of eight means of
    64), so the long ones cost little; each level carries its partial group to the next chunk. The values
    of a given ``m`` are the same whatever the other lengths and the chunk sizes.
    """

    def __init__(self, lengths: tuple[int, ...]):
        self.lengths = tuple(sorted(set().union(*(_chain(int(m)) for m in lengths))))
        self._carry = {m: np.empty(0) for m in self.lengths}
        self.n_values = dict.fromkeys(self.lengths, 0)  # values produced so far, per length

    def feed(self, chunk: np.ndarray) -> dict[int, tuple[int, np.ndarray]]:
        """``{m: (index of the first new value, the new values)}`` completed by ``chunk`` (A)."""
        out = {}
        values = chunk
        previous = 1
        for m in self.lengths:
            if m > 1:
                factor = m // previous
                carry = self._carry[m]
                raw = np.concatenate((carry, values)) if len(carry) else values
                k = len(raw) // factor
                groups = raw[: k * factor].reshape(k, factor)
                values = groups[:, 0].copy()
                for j in range(1, factor):  # column by column: three times faster than mean(axis=1)
                    values += groups[:, j]
                values /= factor
                self._carry[m] = raw[k * factor:].copy()
            out[m] = (self.n_values[m], values)
            self.n_values[m] += len(values)
            previous = m
        return out


def scales_for(block_samples: int) -> tuple[int, ...]:
    """Averaging lengths (samples) at which excursions are sought: 1 and 8, 64, 512 while a block holds at
    least 64 averages (enough for its median and MAD)."""
    return tuple(m for m in SCALES if block_samples // m >= 64 or m == 1)


class BlockScale:
    """Pass 1: median and robust spread, per block of ``block_samples``, of the means of ``m`` samples.

    Parameters
    ----------
    block_samples : int
        Block length, samples (blocks start at multiples of it from the first sample).
    m : int
        Averaging length, samples (1: the samples themselves). A mean belongs to the block of its first
        sample.
    """

    def __init__(self, block_samples: int, m: int = 1):
        if block_samples < 8:
            raise ValueError(f"block must be at least 8 samples, got {block_samples}")
        self.block_samples = int(block_samples)
        self.m = int(m)
        self._pyramid = _Pyramid((self.m,))
        self._current = -1  # block whose values are being collected
        self._values: list[np.ndarray] = []
        self._centres: list[float] = []
        self._scales: list[float] = []
        self.n_samples = 0

    def update(self, chunk: np.ndarray) -> None:
        """Add the next chunk of samples (A)."""
        chunk = np.asarray(chunk, dtype=float)
        self.n_samples += len(chunk)
        self.add_values(*self._pyramid.feed(chunk)[self.m])

    def add_values(self, first: int, values: np.ndarray) -> None:
        """Add means number ``first, first + 1, ...`` (what :meth:`update` does after averaging)."""
        for b, lo, hi in _block_spans(first, len(values), self.m, self.block_samples):
            if b != self._current:
                self._close()
                self._current = b
            self._values.append(values[lo:hi].copy() if self.m == 1 else values[lo:hi])  # chunks may be reused

    def _close(self) -> None:
        if self._values:
            values = np.concatenate(self._values)
            stride = max(1, -(-len(values) // _SCALE_POINTS))
            centre, scale = _robust_centre_scale(values[::stride])
            self._centres.append(centre)
            self._scales.append(scale)
            self._values = []

    def result(self) -> tuple[np.ndarray, np.ndarray]:
        """``(centres, scales)`` of every block, A; a last partial block counts as a block."""
        self._close()
        return np.array(self._centres), np.array(self._scales)


def _block_spans(first: int, n: int, m: int, block_samples: int,
                 last: int | None = None) -> Iterator[tuple[int, int, int]]:
    """``(block, lo, hi)``: values ``lo:hi`` of the ``n`` means from number ``first`` lie in ``block`` (a mean of
    ``m`` samples belongs to the block of its first sample; blocks past ``last`` count as ``last``)."""
    lo = 0
    while lo < n:
        b = (first + lo) * m // block_samples
        if last is not None and b >= last:
            yield last, lo, n
            return
        # First mean of block b + 1: the smallest j with j m >= (b + 1) block_samples.
        hi = min(n, -(-(b + 1) * block_samples // m) - first)
        yield b, lo, hi
        lo = hi


def reference_scale(scales: np.ndarray, half_window: int = SCALE_HALF_WINDOW) -> np.ndarray:
    """Running median of the block spreads over each block and ``half_window`` neighbours on each side
    (the window is cut at the ends of the recording), A."""
    scales = np.asarray(scales, dtype=float)
    n = len(scales)
    if n == 0:
        return scales.copy()
    h = min(int(half_window), n - 1)
    padded = np.concatenate((np.full(h, np.nan), scales, np.full(h, np.nan)))
    windows = np.lib.stride_tricks.sliding_window_view(padded, 2 * h + 1)
    return np.nanmedian(windows, axis=1)


class ExcursionFinder:
    """Pass 2: excursions ``|v - c_b| > threshold * sigma_b`` widened to ``> release * sigma_b`` (streaming),
    where ``v`` are the means of ``m`` samples.

    Parameters
    ----------
    centres, sigmas : ndarray
        Median and reference standard deviation of each block, A (from :class:`BlockScale` with the same
        ``block_samples`` and ``m``).
    block_samples : int
        Block length, samples.
    m : int
        Averaging length, samples.
    threshold, release : float
        ``k`` and ``k_r`` (standard deviations), ``release < threshold``.
    """

    def __init__(self, centres: np.ndarray, sigmas: np.ndarray, block_samples: int, m: int = 1, *,
                 threshold: float = DEFAULT_THRESHOLD_SIGMA, release: float = DEFAULT_RELEASE_SIGMA):
        if not threshold > 0:
            raise ValueError(f"event threshold must be > 0 standard deviations, got {threshold!r}")
        if not 0 <= release < threshold:
            raise ValueError(f"release level must be from 0 to below the threshold {threshold:g}, got {release!r}")
        self.centres = np.asarray(centres, dtype=float)
        self.sigmas = np.asarray(sigmas, dtype=float)
        self.block_samples = int(block_samples)
        self.m = int(m)
        self.threshold = float(threshold)
        self.release = float(release)
        self._pyramid = _Pyramid((self.m,))
        self._open: tuple[int, bool] | None = None  # (start, reached threshold) of a run still going on
        self._starts: list[np.ndarray] = []
        self._ends: list[np.ndarray] = []
        self._end = 0  # means seen

    def update(self, chunk: np.ndarray) -> None:
        """Add the next chunk of samples (A)."""
        self.add_values(*self._pyramid.feed(np.asarray(chunk, dtype=float))[self.m])

    def add_values(self, first: int, values: np.ndarray) -> None:
        """Add means number ``first, first + 1, ...`` (what :meth:`update` does after averaging)."""
        n = len(values)
        if n == 0 or not len(self.centres):
            self._end = first + n
            return
        high = np.empty(n, dtype=bool)
        low = np.empty(n, dtype=bool)
        dev = np.empty(n)
        # Block by block, with the block's centre and sigma as scalars.
        for b, lo, hi in _block_spans(first, n, self.m, self.block_samples, last=len(self.centres) - 1):
            np.abs(np.subtract(values[lo:hi], self.centres[b], out=dev[lo:hi]), out=dev[lo:hi])
            np.greater(dev[lo:hi], self.threshold * self.sigmas[b], out=high[lo:hi])
            np.greater(dev[lo:hi], self.release * self.sigmas[b], out=low[lo:hi])
        # Runs of `low` (value indices) that hold at least one `high` value.
        change = np.flatnonzero(low[1:] != low[:-1]) + 1
        run_starts = change[~low[change - 1]]  # where low turns on
        run_ends = change[low[change - 1]]  # where it turns off
        if low[0]:
            run_starts = np.concatenate(([0], run_starts))
        if low[-1]:
            run_ends = np.concatenate((run_ends, [n]))
        starts, ends = run_starts + first, run_ends + first
        reached = np.zeros(len(starts), dtype=bool)
        hits = np.flatnonzero(high)  # rare: a `high` value is also `low`, so it lies inside a run
        reached[np.searchsorted(run_starts, hits, side="right") - 1] = True
        if self._open is not None:
            open_start, open_reached = self._open
            if len(starts) and starts[0] == first:  # the open run goes on into this chunk
                starts[0] = open_start
                reached[0] |= open_reached
            elif open_reached:  # it ended with the previous chunk
                self._emit(np.array([open_start]), np.array([first]))
            self._open = None
        if len(ends) and ends[-1] == first + n:  # still open at the end of the chunk
            self._open = (int(starts[-1]), bool(reached[-1]))
            starts, ends, reached = starts[:-1], ends[:-1], reached[:-1]
        self._emit(starts[reached], ends[reached])
        self._end = first + n

    def _emit(self, starts: np.ndarray, ends: np.ndarray) -> None:
        if len(starts):  # value indices -> sample indices
            self._starts.append(np.asarray(starts, np.int64) * self.m)
            self._ends.append(np.asarray(ends, np.int64) * self.m)

    def result(self) -> tuple[np.ndarray, np.ndarray]:
        """Excursions ``(starts, ends)`` in order, absolute sample indices, end exclusive."""
        if self._open is not None:
            start, reached = self._open
            if reached:
                self._emit(np.array([start]), np.array([self._end]))
            self._open = None
        if not self._starts:
            return np.zeros(0, np.int64), np.zeros(0, np.int64)
        return np.concatenate(self._starts), np.concatenate(self._ends)


def merge_intervals(starts: np.ndarray, ends: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Union of intervals ``[start, end)``: sorted, disjoint, touching ones joined."""
    starts, ends = np.asarray(starts, np.int64), np.asarray(ends, np.int64)
    if not len(starts):
        return starts, ends
    order = np.argsort(starts, kind="stable")
    starts, ends = starts[order], ends[order]
    reach = np.maximum.accumulate(ends)
    new_group = np.concatenate(([True], starts[1:] > reach[:-1]))
    group = np.cumsum(new_group) - 1
    merged_ends = np.zeros(int(group[-1]) + 1, np.int64)
    np.maximum.at(merged_ends, group, ends)
    return starts[new_group], merged_ends


def excluded_segments(starts: np.ndarray, ends: np.ndarray, n_segments: int, nperseg: int, step: int) -> np.ndarray:
    """For segments ``0 .. n_segments - 1`` of a Welch grid, whether each overlaps an excursion."""
    return overlaps_intervals(np.arange(n_segments, dtype=np.int64) * step, nperseg, starts, ends)


def choose_segment(starts: np.ndarray, ends: np.ndarray, n_samples: int, nperseg: int, overlap: float, *,
                   adapt: bool = True, min_clean: int = MIN_CLEAN_SEGMENTS
                   ) -> tuple[int, list[tuple[int, int, int]]]:
    """Longest segment (the requested one, or halved) with enough clean segments.

    Parameters
    ----------
    starts, ends : ndarray of int
        Excursions.
    n_samples : int
        Recording length, samples.
    nperseg : int
        Requested segment, samples.
    overlap : float
        Overlap as a fraction of the segment.
    adapt : bool
        False: keep ``nperseg`` whatever happens.
    min_clean : int
        Clean segments wanted (capped at the number of segments the requested length gives).

    Returns
    -------
    segment : int
        Chosen length, samples: the longest with ``min_clean`` clean segments; if none has, the one with
        the most clean segments.
    candidates : list of (int, int, int)
        ``(segment, segments, clean segments)`` of each length tried.
    """
    candidates: list[tuple[int, int, int]] = []
    length = int(nperseg)
    floor = max(MIN_SEGMENT_SAMPLES, nperseg // MAX_SHORTENING) if adapt else nperseg
    while True:
        step = length - int(round(overlap * length))
        total = (n_samples - (length - step)) // step if n_samples >= length else 0
        clean = total - int(np.count_nonzero(excluded_segments(starts, ends, total, length, step)))
        candidates.append((length, total, clean))
        if clean >= max(min(min_clean, candidates[0][1]), 1):
            return length, candidates
        if length // 2 < floor:
            return max(candidates, key=lambda c: (c[2], c[0]))[0], candidates
        length //= 2


def find_events(read: Callable[[], Iterator[np.ndarray]], block_samples: int, *,
                threshold: float = DEFAULT_THRESHOLD_SIGMA, release: float = DEFAULT_RELEASE_SIGMA,
                sample_rate_hz: float = math.nan) -> EventExclusion:
    """Passes 1 and 2: the noise scale of each block, then the excursions, at every averaging length.

    Parameters
    ----------
    read : callable
        Returns a fresh iterator over the recording's chunks (A) each time it is called (it is called twice).
    block_samples : int
        Block length of the noise scale, samples (the requested Welch segment).
    threshold, release : float
        ``k`` and ``k_r``, robust standard deviations.
    sample_rate_hz : float
        Sampling rate, Hz (for the times reported).

    Returns
    -------
    EventExclusion
        With the excursions and the noise scale; the segment fields are left for :func:`choose_segment`.
    """
    ms = scales_for(block_samples)
    scanners = [BlockScale(block_samples, m) for m in ms]
    pyramid = _Pyramid(ms)
    n_samples = 0
    for chunk in read():
        chunk = np.asarray(chunk, dtype=float)
        n_samples += len(chunk)
        means = pyramid.feed(chunk)
        for scanner in scanners:
            scanner.add_values(*means[scanner.m])
    stats = [scanner.result() for scanner in scanners]
    out = EventExclusion(mode="exclude", threshold_sigma=float(threshold), release_sigma=float(release),
                         block_samples=int(block_samples), n_samples=n_samples,
                         sample_rate_hz=float(sample_rate_hz), averaging_samples=ms,
                         sigma_by_scale_A=tuple(float(np.median(sc)) if len(sc) else math.nan for _, sc in stats))
    out.sigma_A = out.sigma_by_scale_A[0]
    if not len(stats[0][0]):
        return out
    finders = [ExcursionFinder(centres, reference_scale(sc), block_samples, m, threshold=threshold, release=release)
               for m, (centres, sc) in zip(ms, stats, strict=True)]
    pyramid = _Pyramid(ms)
    for chunk in read():
        means = pyramid.feed(np.asarray(chunk, dtype=float))
        for finder in finders:
            finder.add_values(*means[finder.m])
    found = [finder.result() for finder in finders]
    out.starts, out.ends = merge_intervals(np.concatenate([a for a, _ in found]), np.concatenate([b for _, b in found]))
    return out
