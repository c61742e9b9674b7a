"""Threshold detector with hysteresis on a tracked baseline and a robust, block-wise noise estimate.

Algorithm (full discussion and the choice of defaults in docs/detectors.md)
---------------------------------------------------------------------------
1. The stream is cut into fixed blocks of ``baseline_window`` counted from its first sample. Each block gets
   a baseline level (median, then the median again without samples beyond 3 robust sigmas, so events
   hardly bias it) placed at the block centre; the baseline under any sample is the straight line
   between neighbouring centres (the nearest line extended before the first and after the last centre).
2. Each block's noise sigma is 1.4826 x the median absolute deviation of its baseline-subtracted samples
   (for one polarity, of those on the quiet side, which events do not reach). That is the spread of the
   very values being thresholded, whatever the noise colour; first differences would misjudge it for
   filtered (correlated) noise.
   Both statistics (level, its MAD and clipped median, and the noise sigma) are computed on every s-th
   sample of the block counted from its first sample, s = ceil(block length / ``stat_samples``) (1 when
   the block is not longer, or ``stat_samples`` = 0): at most ``stat_samples`` and more than half as many
   samples. The baseline line and the residuals that are scanned still cover every sample.
3. Sample excursions (signed by polarity) above ``release_sigma`` x sigma form runs; a run is kept if it
   holds a sample above ``k_sigma`` x sigma. Runs longer than ``max_duration`` are cut into consecutive
   pieces of that length (each kept on its own merit, flagged ``split``). Kept pieces closer than
   ``merge_gap`` merge into one event as long as the event stays within ``max_duration``; events shorter
   than ``min_duration`` are dropped.

Every estimate depends only on absolute sample positions, so chunking changes nothing (bit for bit).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from impactline import Column, Detector, Event, Param, ParameterError, format_quantity

from ._common import MAD_TO_SIGMA, SampleBuffer, check_chunk, median, robust_sigma

__all__ = ["ThresholdDetector"]

#: Samples further than this many robust sigmas from a block's median are left out of its second median.
_CLIP_SIGMAS = 3.0
#: Fewest samples a baseline block may hold (median and MAD need a reasonable sample).
_MIN_BLOCK = 32


def _stride(n: int, stat_samples: int) -> int:
    """Stride of the statistics subsample of a block of ``n`` samples: ceil(n / stat_samples), at least 1.

    ``stat_samples`` = 0 means every sample (stride 1). The subsample ``block[::stride]`` then holds at most
    ``stat_samples`` and more than ``stat_samples / 2`` samples (or the whole block when it is not longer).
    """
    if stat_samples <= 0 or n <= stat_samples:
        return 1
    return -(-n // stat_samples)


def _ranked_pair(ordered: np.ndarray, half: int, rank: int) -> tuple[float, float]:
    """Values of ranks ``rank - 1`` and ``rank`` (0-based, ascending) of an array partitioned at ``half``.

    The lower value is NaN for rank 0. Only the side of ``half`` holding ``rank`` is partitioned again.
    """
    if rank <= half:
        if rank == half:
            lower = float(ordered[:half].max()) if half else float("nan")
            return lower, float(ordered[half])
        side = np.partition(ordered[:half], rank)
        return (float(side[:rank].max()) if rank else float("nan")), float(side[rank])
    k = rank - half - 1
    side = np.partition(ordered[half + 1:], k)
    return (float(side[:k].max()) if k else float(ordered[half])), float(side[k])


class _SharedBlocks:
    """Per-block results kept for the other detectors fed the same samples (``Detector.start_shared``).

    Entries are dropped once every detector sharing them has read past them, so memory stays bounded.
    """

    def __init__(self) -> None:
        self.values: dict[int, Any] = {}
        self.progress: dict[int, int] = {}
        self.low = 0

    def join(self, consumer: int) -> None:
        self.progress[consumer] = 0

    def done(self, consumer: int, upto: int) -> None:
        """``consumer`` will not ask for blocks below ``upto`` again."""
        self.progress[consumer] = upto
        floor = min(self.progress.values())
        while self.low < floor:
            self.values.pop(self.low, None)
            self.low += 1


def _per_block(book: _SharedBlocks | None, consumer: int, j: int, compute: Callable[[], Any]) -> Any:
    """``compute()`` for block ``j``, or the value another detector sharing ``book`` stored for it."""
    if book is None:
        return compute()
    if j in book.values:
        value = book.values[j]
    else:
        value = book.values[j] = compute()
    book.done(consumer, j + 1)
    return value


@dataclass
class _Piece:
    """A kept run piece, or an event being assembled from merged pieces."""

    start: int
    end: int
    n_sub: int
    peak_index: int
    peak_value: float
    split: bool
    baseline: float
    noise: float


@dataclass
class _Track:
    """Scanning state of one polarity."""

    sign: int
    resume: int                       # absolute index where the next scan begins
    open_start: int | None = None     # start of the run piece still growing at the frontier
    open_split: bool = False          # that piece began at a max_duration cut, not at a release crossing
    event: _Piece | None = None       # event that may still absorb later pieces (merge_gap)


@dataclass
class _State:
    fs: float
    block: int
    max_len: int
    merge_gap: float       # samples
    min_len: float         # samples
    stat: int = 0          # statistics subsample size per block (0: every sample; see _stride)
    origin: int | None = None
    buf: SampleBuffer | None = None
    centres: dict[int, float] = field(default_factory=dict)   # block -> centre, samples from origin
    levels: dict[int, float] = field(default_factory=dict)    # block -> baseline level, A
    sigmas: dict[int, float] = field(default_factory=dict)    # block -> noise sigma, A
    next_stat: int = 0
    next_class: int = 0
    region_start: int = 0
    region_d: np.ndarray = field(default_factory=lambda: np.empty(0))   # x - baseline, A
    region_b: np.ndarray = field(default_factory=lambda: np.empty(0))   # baseline, A
    region_s: np.ndarray = field(default_factory=lambda: np.empty(0))   # noise sigma, A
    tracks: list[_Track] = field(default_factory=list)
    ready: list[Event] = field(default_factory=list)
    shared_levels: _SharedBlocks | None = None   # block -> (level, centre), shared with other detectors
    shared_sigmas: _SharedBlocks | None = None   # block -> (noise sigma, per-sample copy), shared likewise
    shared_residuals: _SharedBlocks | None = None   # block -> (baseline, samples - baseline) arrays, A


class ThresholdDetector(Detector):
    """Events where the current leaves its tracked baseline by more than ``k_sigma`` noise sigmas.

    Parameters
    ----------
    k_sigma : float
        Trigger level in noise sigmas (default 5).
    release_sigma : float
        End level in noise sigmas (default 0: the baseline); an event spans the release crossings around its
        trigger. Ending at the baseline keeps the tail of a decaying pulse, and so its charge.
    polarity : {"anodic", "cathodic", "both"}
        Direction of excursions to report (anodic = positive current).
    min_duration : float
        Events shorter than this are dropped, s (default 0).
    merge_gap : float
        Kept excursions separated by less than this merge into one event, s (default 500 us: the sub-spikes
        of a burst and the slow tail of a spike stay one event).
    max_duration : float
        Longest event, s (default 50 ms); longer excursions are split into consecutive events.
    baseline_window : float
        Block length of the baseline and noise tracker, s (default 100 ms).
    noise_rms : float or None
        Fixed noise sigma, A, instead of the block-wise estimate.
    stat_samples : int
        Samples per block the baseline level and noise sigma are computed from (default 8192; 0 = every
        sample). A longer block is subsampled with stride s = ceil(block length / stat_samples), from its
        first sample (absolute positions, so chunking still changes nothing); the baseline line and the
        thresholded residuals still cover every sample. 8192 samples give the level to about 1.4 % and
        the noise sigma to about 2 % of sigma on white noise (docs/detectors.md, "Statistics on a
        subsample").

    Notes
    -----
    Events carry ``n_subpeaks`` (excursions merged into the event: runs beyond the release level that reach
    the trigger level, so noise about the trigger level never counts twice), ``peak_index`` (absolute
    index of the largest excursion in the event's direction) and ``split`` (the event is a piece of an
    excursion longer than ``max_duration``).
    """

    name = "threshold"
    kind = "detector"
    # 2: n_subpeaks counts excursions, not noise crossings of the trigger; new defaults.
    # 3: block level and noise from a strided subsample (stat_samples = 8192), so values change slightly.
    version = "3"
    summary = "excursions beyond k noise sigmas from a tracked baseline, with hysteresis and merging"
    params = {
        "k_sigma": Param(5.0, low=0, low_inclusive=False,
                         doc="trigger level: excursion from the baseline in noise sigmas"),
        "release_sigma": Param(0.0, low=0,
                               doc="end level in noise sigmas (<= k_sigma); events span its crossings"),
        "polarity": Param("anodic", kind=str, choices=("anodic", "cathodic", "both"),
                          doc="direction of excursions: anodic (positive current), cathodic or both"),
        "min_duration": Param(0.0, unit="s", low=0, doc="drop events shorter than this"),
        "merge_gap": Param(500e-6, unit="s", low=0,
                           doc="excursions separated by less than this merge into one event"),
        "max_duration": Param(0.05, unit="s", low=0, low_inclusive=False,
                              doc="longest event; longer excursions are split into consecutive events"),
        "baseline_window": Param(0.1, unit="s", low=0, low_inclusive=False,
                                 doc="block length of the baseline and noise tracker"),
        "noise_rms": Param(None, unit="A", low=0, low_inclusive=False,
                           doc="fixed noise sigma instead of the block-wise estimate"),
        "stat_samples": Param(8192, kind=int, low=0,
                              doc="samples per block (evenly strided) for the level and noise; 0 = all"),
    }
    columns = {
        "n_subpeaks": Column("int32", "", "excursions merged into the event (each a run beyond the release "
                                          "level reaching the trigger level)"),
        "peak_index": Column("int64", "", "absolute sample index of the largest excursion"),
        "split": Column("bool", "", "piece of an excursion longer than max_duration (cut at start or end)"),
    }

    def __init__(self, **values: Any):
        super().__init__(**values)
        if self.release_sigma > self.k_sigma:
            raise ParameterError(
                f"detector {self.name!r}", "release_sigma",
                f"expected a number <= k_sigma ({self.k_sigma:g}), got {self.release_sigma:g}",
            )

    # ------------------------------------------------------------------ sizes
    def _sizes(self, sample_rate_hz: float) -> tuple[int, int, float, float]:
        """Block length, max_duration (samples), merge gap and min_duration (samples, float)."""
        if not sample_rate_hz > 0:
            raise ValueError(f"detector {self.name!r}: sample rate must be > 0 Hz, got {sample_rate_hz!r}")
        block = int(round(self.baseline_window * sample_rate_hz))
        if block < _MIN_BLOCK:
            raise ParameterError(
                f"detector {self.name!r}", "baseline_window",
                f"{format_quantity(self.baseline_window, 's')} is {block} samples at "
                f"{format_quantity(sample_rate_hz, 'Hz')}; expected at least {_MIN_BLOCK} samples "
                f"(>= {format_quantity(_MIN_BLOCK / sample_rate_hz, 's')})",
            )
        max_len = int(round(self.max_duration * sample_rate_hz))
        if max_len < 1:
            raise ParameterError(
                f"detector {self.name!r}", "max_duration",
                f"{format_quantity(self.max_duration, 's')} is shorter than one sample at "
                f"{format_quantity(sample_rate_hz, 'Hz')}",
            )
        return block, max_len, self.merge_gap * sample_rate_hz, self.min_duration * sample_rate_hz

    def lookback_samples(self, sample_rate_hz: float) -> int:
        """Largest distance from the newest input sample back to the start of an event not yet emitted.

        Samples are classified a block after they arrive (the baseline interpolates towards the next
        block's centre), so up to ``2 * block`` samples are unclassified; an event still open or waiting
        for a merge starts at most ``max_duration`` before the classified frontier.
        """
        block, max_len, _, _ = self._sizes(sample_rate_hz)
        return max_len + 2 * block + 1

    # ------------------------------------------------------------------ stream
    def start(self, sample_rate_hz: float) -> _State:
        """Return the initial state for a stream sampled at ``sample_rate_hz`` (Hz)."""
        block, max_len, gap, min_len = self._sizes(sample_rate_hz)
        signs = {"anodic": (1,), "cathodic": (-1,), "both": (1, -1)}[self.polarity]
        # A subsample no smaller than the block is the block itself: stored as 0, so equivalent settings
        # share one memo entry (start_shared).
        stat = self.stat_samples if 0 < self.stat_samples < block else 0
        state = _State(fs=float(sample_rate_hz), block=block, max_len=max_len, merge_gap=gap, min_len=min_len,
                       stat=stat)
        state.tracks = [_Track(sign=s, resume=0) for s in signs]
        return state

    def start_shared(self, sample_rate_hz: float, memo: dict) -> _State:
        """Initial state of a stream other detectors also receive: block levels and noise are computed once.

        A block's baseline level and centre, and so its baseline line and the samples minus it, depend only
        on the samples, ``baseline_window`` and ``stat_samples`` (the subsample they are computed from); its
        noise also on ``polarity`` (which side is quiet). All three are keys of the memo entries.
        Detectors of this class with the same settings, whatever their ``k_sigma``, ``release_sigma`` or
        durations, read them from ``memo`` instead of computing them again; the events are the same, bit
        for bit. A block's entries stay until every sharer has read them, so sharers should be fed chunk by
        chunk together, as a comparison does (one far ahead of the others holds a chunk's blocks per chunk
        of lead).
        """
        st = self.start(sample_rate_hz)
        st.shared_levels = memo.setdefault((type(self), "levels", st.block, st.stat), _SharedBlocks())
        st.shared_levels.join(id(st))
        st.shared_residuals = memo.setdefault((type(self), "residuals", st.block, st.stat), _SharedBlocks())
        st.shared_residuals.join(id(st))
        if self.noise_rms is None:
            key = (type(self), "sigmas", st.block, st.stat, self.polarity)
            st.shared_sigmas = memo.setdefault(key, _SharedBlocks())
            st.shared_sigmas.join(id(st))
        return st

    def process(self, x: np.ndarray, first_index: int, state: _State) -> tuple[list[Event], _State]:
        """Consume the next chunk of filtered current (A); ``x[0]`` has absolute index ``first_index``."""
        st = state
        if st.origin is None:
            st.origin = st.region_start = int(first_index)
            st.buf = SampleBuffer(st.origin)
            for track in st.tracks:
                track.resume = st.origin
        x = check_chunk(self.name, x, first_index, st.buf.end)
        st.buf.append(x)
        while st.buf.end >= st.origin + (st.next_stat + 1) * st.block:
            a = st.origin + st.next_stat * st.block
            self._block_level(st, st.next_stat, a, a + st.block)
            st.next_stat += 1
        # A block is classified once the next block's level is known (the baseline interpolates to it).
        while st.next_class + 1 < st.next_stat:
            self._classify_block(st, st.next_class)
        return self._emit(st, final=False), st

    def finish(self, state: _State) -> list[Event]:
        """Classify the held-back samples, close open events and return every event not yet emitted."""
        st = state
        if st.origin is None:
            return []
        total = st.buf.end - st.origin
        n_full, tail = divmod(total, st.block)
        # A tail of at least half a block (or the only data) is a block of its own; a shorter one is
        # covered by the last block's level and noise, so a few end samples cannot set the end baseline.
        tail_is_block = tail > 0 and (2 * tail >= st.block or n_full == 0)
        if tail_is_block:
            a = st.origin + n_full * st.block
            self._block_level(st, n_full, a, st.buf.end)
            st.next_stat = n_full + 1
        while st.next_class < st.next_stat:
            self._classify_block(st, st.next_class)
        if tail > 0 and not tail_is_block:
            last = st.next_stat - 1
            self._classify(st, last, st.origin + n_full * st.block, st.buf.end, st.sigmas[last])
        self._scan_all(st, final=True)
        return self._emit(st, final=True)

    # ------------------------------------------------------------------ baseline and noise
    def _block_level(self, st: _State, j: int, a: int, b: int) -> None:
        st.levels[j], st.centres[j] = _per_block(st.shared_levels, id(st), j, lambda: self._level(st, a, b))

    def _level(self, st: _State, a: int, b: int) -> tuple[float, float]:
        """Baseline level (A) of samples ``[a, b)`` and the block centre (samples from the origin).

        The level is computed from the strided subsample ``[a, b)[::s]`` (see ``_stride``); the centre is
        that of the whole block.
        """
        xb = st.buf.view(a, b)[::_stride(b - a, st.stat)]
        n = xb.size
        half = n // 2
        ordered = np.partition(xb, half)
        first = float(ordered[half]) if n % 2 else 0.5 * (float(ordered[:half].max()) + float(ordered[half]))
        spread = np.abs(ordered - first)
        sigma = MAD_TO_SIGMA * median(spread)
        level = first
        if sigma > 0:
            # The samples within the clip are contiguous in sorted order (|x - first| grows away from
            # first), so their median is a rank of the whole block, found in the half that ``ordered``
            # already splits off rather than by copying the kept samples out and partitioning them again.
            inside = spread <= _CLIP_SIGMAS * sigma
            kept = int(np.count_nonzero(inside))
            below = int(np.count_nonzero(ordered[~inside] < first))
            lower, upper = _ranked_pair(ordered, half, below + kept // 2)
            level = upper if kept % 2 else 0.5 * (lower + upper)
        return level, (a - st.origin) + (b - a - 1) / 2.0

    def _baseline(self, st: _State, j: int, pos: np.ndarray) -> np.ndarray:
        """Baseline (A) at positions ``pos`` (samples from origin, ascending) inside block ``j``."""
        centre, level = st.centres[j], st.levels[j]
        out = np.full(len(pos), level)
        split = int(np.searchsorted(pos, centre))
        # Elementwise arithmetic only, so a sample's baseline never depends on which array it sits in.
        # Before the first and after the last centre the nearest segment is extended, so a drift is
        # followed to the ends of the record.
        lower = j - 1 if j - 1 in st.levels else j
        upper = j + 1 if j + 1 in st.levels else j
        for part, a, b in ((slice(0, split), lower, upper if lower == j else j),
                           (slice(split, len(pos)), lower if upper == j else j, upper)):
            if a != b:
                ca, la, cb, lb = st.centres[a], st.levels[a], st.centres[b], st.levels[b]
                line = pos[part] - ca   # one temporary, scaled and shifted in place
                line *= (lb - la) / (cb - ca)
                line += la
                out[part] = line
        return out

    def _noise(self, residual: np.ndarray) -> float:
        """Noise sigma (A) of one block from its baseline-subtracted samples (the strided subsample).

        With one polarity the spread is read from the quiet side only (residuals of the opposite sign):
        the noise is symmetric, the events are not, so events barely bias it. With both polarities the
        MAD about the baseline is used (biased up by about 1.3 x the fraction of samples in events).
        """
        if self.polarity != "both":
            anodic = self.polarity == "anodic"
            m = int(np.count_nonzero(residual < 0 if anodic else residual > 0))
            if m >= _MIN_BLOCK // 2:
                # The quiet samples are the m lowest (anodic) or highest (cathodic) of the block, so the
                # median of their magnitudes is a rank of the block itself: no masked copy, no abs. The
                # value is the same, bit for bit, as the median of |quiet| (negation is exact).
                first = 0 if anodic else residual.size - m
                half = m // 2
                rank = first + (m - 1 - half if anodic else half)
                part = np.partition(residual, rank)
                middle = float(part[rank])
                if m % 2 == 0:
                    neighbour = float(part[rank + 1:].min()) if anodic else float(part[:rank].max())
                    middle = 0.5 * (neighbour + middle)
                sigma = MAD_TO_SIGMA * (-middle if anodic else middle)
                if sigma > 0.0:
                    return sigma
        return robust_sigma(residual, centre=0.0)

    def _classify_block(self, st: _State, j: int) -> None:
        a = st.origin + j * st.block
        b = min(a + st.block, st.buf.end)
        self._classify(st, j, a, b, None)
        st.next_class = j + 1
        for old in [k for k in st.levels if k < j - 1]:
            del st.levels[old], st.centres[old]
            st.sigmas.pop(old, None)

    def _classify(self, st: _State, j: int, a: int, b: int, sigma: float | None) -> None:
        """Subtract the baseline from samples ``[a, b)`` of block ``j``, add them to the scan region, scan."""
        def residuals() -> tuple[np.ndarray, np.ndarray]:
            baseline = self._baseline(st, j, np.arange(a - st.origin, b - st.origin, dtype=np.float64))
            return baseline, st.buf.view(a, b) - baseline

        book = st.shared_residuals if sigma is None else None   # the record's tail is classified once
        baseline, d = _per_block(book, id(st), j, residuals)
        sigmas = None
        if sigma is None:
            if self.noise_rms is not None:
                sigma = self.noise_rms
            else:
                def noise() -> tuple[float, np.ndarray]:
                    # The same subsample as the level's: every s-th residual from the block's first sample.
                    value = self._noise(d[::_stride(b - a, st.stat)])
                    return value, np.full(len(d), value)

                # The per-sample copy the scan compares against is shared along with the value.
                sigma, sigmas = _per_block(st.shared_sigmas, id(st), j, noise)
            st.sigmas[j] = sigma
        if sigmas is None:
            sigmas = np.full(len(d), sigma)
        if st.region_d.size:
            st.region_d = np.concatenate((st.region_d, d))
            st.region_b = np.concatenate((st.region_b, baseline))
            st.region_s = np.concatenate((st.region_s, sigmas))
        else:
            # Usually the last scan used up the region: take the block's arrays as they are (they are only
            # ever read, so sharing them with other detectors through the memo is safe).
            st.region_d, st.region_b, st.region_s = d, baseline, sigmas
        st.buf.discard_before(b)
        self._scan_all(st, final=False)

    # ------------------------------------------------------------------ runs, pieces, events
    def _scan_all(self, st: _State, final: bool) -> None:
        frontier = st.region_start + len(st.region_d)
        for track in st.tracks:
            pieces = self._scan(st, track, frontier, final)
            self._assemble(st, track, pieces, frontier, final)
        keep_from = min(track.resume for track in st.tracks)
        cut = keep_from - st.region_start
        if cut > 0:
            st.region_d, st.region_b, st.region_s = st.region_d[cut:], st.region_b[cut:], st.region_s[cut:]
            st.region_start = keep_from

    def _scan(self, st: _State, track: _Track, frontier: int, final: bool) -> list[_Piece]:
        """Find the closed, triggered run pieces in ``[track.resume, frontier)``.

        Trigger samples are rare, so they are found first (one pass) and each one's run is bounded by
        searching outwards for the release level; the run reaching the frontier is kept open (when the
        stream goes on) whether or not it has triggered yet.
        """
        a = track.resume
        off = a - st.region_start
        d = st.region_d[off:]
        sig = st.region_s[off:]
        n = len(d)
        sign = track.sign
        resumed_open = track.open_start is not None
        resumed_split = track.open_split
        track.open_start, track.open_split = None, False
        track.resume = frontier
        if n == 0:
            return []
        # sign * d > c * sig, written without negating d: -d > y exactly when d < -y.
        trigger_level = self.k_sigma * sig
        triggers = np.flatnonzero(d > trigger_level if sign > 0 else d < -trigger_level)
        release = self.release_sigma

        def quiet(lo: int, hi: int) -> np.ndarray:
            """Samples of [lo, hi) at or below the release level, as offsets from lo."""
            level = release * sig[lo:hi]
            return np.flatnonzero(~(d[lo:hi] > level) if sign > 0 else ~(d[lo:hi] < -level))

        def run_start(i: int) -> int:
            width = 64
            hi = i
            while hi > 0:
                lo = max(hi - width, 0)
                below = quiet(lo, hi)
                if below.size:
                    return lo + int(below[-1]) + 1
                hi, width = lo, 2 * width
            return 0

        def run_end(i: int) -> int:
            # A run usually ends a pulse's decay after its trigger (a few hundred samples): one look then does.
            width = 256
            lo = i
            while lo < n:
                hi = min(lo + width, n)
                below = quiet(lo, hi)
                if below.size:
                    return lo + int(below[0])
                lo, width = hi, 2 * width
            return n

        runs = []
        i = 0
        while i < triggers.size:
            t = int(triggers[i])
            s, e = run_start(t), run_end(t + 1)
            runs.append((s, e))
            i = int(np.searchsorted(triggers, e))
        if not final and not quiet(n - 1, n).size and (not runs or runs[-1][1] != n):
            runs.append((run_start(n - 1), n))
        pieces = []
        for s, end in runs:
            ps = s
            while ps < end:
                pe = min(ps + st.max_len, end)
                split_start = ps > s or (ps == 0 and resumed_open and resumed_split)
                if pe == n and not final:
                    track.open_start, track.open_split = a + ps, split_start
                    track.resume = a + ps
                    break
                # One excursion per piece, however often noise carries it back and forth across the
                # trigger level: only a return to the release level separates two excursions (the same
                # hysteresis that bounds the events).
                first = int(np.searchsorted(triggers, ps))
                if first < triggers.size and triggers[first] < pe:
                    excursion = d[ps:pe] if sign > 0 else -d[ps:pe]
                    peak = int(np.argmax(excursion))
                    pieces.append(_Piece(
                        start=a + ps, end=a + pe, n_sub=1, peak_index=a + ps + peak,
                        peak_value=float(excursion[peak]), split=split_start or pe < end,
                        baseline=float(st.region_b[off + ps]), noise=float(sig[ps]),
                    ))
                ps = pe
        return pieces

    def _assemble(self, st: _State, track: _Track, pieces: list[_Piece], frontier: int, final: bool) -> None:
        """Merge pieces closer than merge_gap (within max_duration); finalise events that can't grow."""
        for piece in pieces:
            event = track.event
            if (event is not None and piece.start - event.end < st.merge_gap
                    and piece.end - event.start <= st.max_len):
                event.end = piece.end
                event.n_sub += piece.n_sub
                event.split = event.split or piece.split
                if piece.peak_value > event.peak_value:
                    event.peak_value, event.peak_index = piece.peak_value, piece.peak_index
            else:
                self._finalise(st, track)
                track.event = piece
        event = track.event
        if event is None:
            return
        if not final:
            # The open piece, or any piece starting at the frontier, could still merge into the event.
            grow_open = (track.open_start is not None and track.open_start - event.end < st.merge_gap
                         and frontier - event.start <= st.max_len)
            grow_new = frontier - event.end < st.merge_gap and frontier + 1 - event.start <= st.max_len
            if grow_open or grow_new:
                return
        self._finalise(st, track)

    def _finalise(self, st: _State, track: _Track) -> None:
        event = track.event
        track.event = None
        if event is None or event.end - event.start < st.min_len:
            return
        st.ready.append(Event(
            start_index=event.start, end_index=event.end, baseline_A=event.baseline, noise_rms_A=event.noise,
            polarity=track.sign,
            extras={"n_subpeaks": event.n_sub, "peak_index": event.peak_index, "split": event.split},
        ))

    def _emit(self, st: _State, final: bool) -> list[Event]:
        """Release finished events in start order once no earlier-starting event can still appear."""
        if final:
            bound = None
        else:
            candidates = [st.region_start + len(st.region_d)]
            for track in st.tracks:
                if track.event is not None:
                    candidates.append(track.event.start)
                if track.open_start is not None:
                    candidates.append(track.open_start)
            bound = min(candidates)
        st.ready.sort(key=lambda ev: ev.start_index)
        count = len(st.ready) if bound is None else sum(1 for ev in st.ready if ev.start_index < bound)
        out, st.ready = st.ready[:count], st.ready[count:]
        return out
