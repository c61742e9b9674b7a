"""One-sided power spectral density by Welch's method, streamed chunk by chunk, and what is read off it.

Welch (1967), IEEE Trans. Audio Electroacoust. 15:70-73: the recording is cut into segments of
``nperseg`` samples that overlap by ``noverlap``; each segment is detrended, windowed and transformed; the
periodograms are averaged. :class:`WelchAccumulator` feeds whole segments of each chunk to
``scipy.signal.welch`` and carries the leftover samples to the next chunk, so memory stays flat in file
length and the result equals ``scipy.signal.welch`` on the whole array (same settings) to float tolerance.

Also here: the statistics of the estimate (effective number of averages, correlation of neighbouring
bins), mains-line detection and masking, and rms noise over a band or versus bandwidth.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass, field

import numpy as np
from scipy import fft as sp_fft
from scipy import ndimage, signal, stats

__all__ = [
    "Spectrum",
    "MainsPeak",
    "WelchAccumulator",
    "welch_spectrum",
    "default_segment_samples",
    "find_mains_peaks",
    "band_rms",
    "cumulative_rms",
    "bin_correlation",
]


@dataclass
class MainsPeak:
    """One mains line found in a spectrum.

    Attributes
    ----------
    harmonic : int
        Multiple of the mains frequency (1 = fundamental).
    frequency_hz : float
        Frequency of the largest bin of the line, Hz.
    excess_psd_A2_per_Hz : float
        Peak PSD minus the local floor, A^2/Hz.
    line_rms_A : float
        rms current of the line (its excess power integrated over the masked bins), A.
    significance : float
        Peak PSD over the local floor (1 = no line).
    """

    harmonic: int
    frequency_hz: float
    excess_psd_A2_per_Hz: float
    line_rms_A: float
    significance: float


@dataclass
class Spectrum:
    """A one-sided PSD estimate with the settings that produced it.

    Attributes
    ----------
    freqs_hz : ndarray
        Bin frequencies, Hz (0 to Nyquist).
    psd : ndarray
        One-sided PSD, A^2/Hz.
    sample_rate_hz : float
        Sampling rate, Hz.
    nperseg, noverlap : int
        Segment length and overlap, samples.
    window : str
        Window name (``scipy.signal.get_window``).
    detrend : str or bool
        Per-segment detrending (``"constant"``, ``"linear"`` or False).
    n_segments : int
        Number of segments averaged.
    n_samples : int
        Samples read (the tail shorter than a segment step is not used).
    n_segments_total : int, optional
        Segments on the grid, averaged or left out for holding an event (default: ``n_segments``).
    used_samples : int, optional
        Samples inside the averaged segments (default: ``n_samples``).
    lag_pairs : ndarray, optional
        ``lag_pairs[j - 1]``: pairs of averaged segments ``j`` steps apart, for the effective number of
        averages when segments were left out (None: all consecutive segments were averaged).
    mean_A : float
        Mean current of the samples read, A.
    mask : ndarray of bool
        True for bins under a mains line (excluded from fits; replaced by the local floor in masked rms).
    mains_hz : float
        Mains frequency the mask refers to (0 when none was found or searched).
    mains_peaks : list of MainsPeak
        Lines found.
    """

    freqs_hz: np.ndarray
    psd: np.ndarray
    sample_rate_hz: float
    nperseg: int
    noverlap: int
    window: str
    detrend: str | bool
    n_segments: int
    n_samples: int
    mean_A: float
    mask: np.ndarray = field(default=None)  # type: ignore[assignment]
    floor: np.ndarray = field(default=None)  # type: ignore[assignment]
    mains_hz: float = 0.0
    mains_peaks: list[MainsPeak] = field(default_factory=list)
    n_segments_total: int = None  # type: ignore[assignment]
    used_samples: int = None  # type: ignore[assignment]
    lag_pairs: np.ndarray | None = None

    def __post_init__(self) -> None:
        if self.mask is None:
            self.mask = np.zeros(self.psd.shape, bool)
        if self.n_segments_total is None:
            self.n_segments_total = self.n_segments
        if self.used_samples is None:
            self.used_samples = self.n_samples

    @property
    def n_segments_excluded(self) -> int:
        """Segments left out of the average (they held an event)."""
        return self.n_segments_total - self.n_segments

    @property
    def resolution_hz(self) -> float:
        """Bin spacing, Hz."""
        return self.sample_rate_hz / self.nperseg

    @property
    def segment_s(self) -> float:
        """Segment duration, s."""
        return self.nperseg / self.sample_rate_hz

    @property
    def duration_s(self) -> float:
        """Duration of the samples read, s."""
        return self.n_samples / self.sample_rate_hz

    @property
    def window_values(self) -> np.ndarray:
        """The window as used by ``scipy.signal.welch`` (periodic form)."""
        return signal.get_window(self.window, self.nperseg)

    @property
    def enbw_hz(self) -> float:
        """Equivalent noise bandwidth of one bin, Hz: ``fs * sum(w^2) / sum(w)^2``."""
        w = self.window_values
        return float(self.sample_rate_hz * np.sum(w ** 2) / np.sum(w) ** 2)

    @property
    def effective_averages(self) -> float:
        """Number of independent periodograms the overlapped average is worth (see :func:`welch_dof`)."""
        return effective_averages(self.window_values, self.n_segments, self.nperseg - self.noverlap,
                                  lag_pairs=self.lag_pairs)

    @property
    def masked_psd(self) -> np.ndarray:
        """PSD with bins under mains lines replaced by the local floor, A^2/Hz."""
        if self.floor is None or not self.mask.any():
            return self.psd
        out = self.psd.copy()
        out[self.mask] = self.floor[self.mask]
        return out


def effective_averages(window: np.ndarray, n_segments: int, step: int, *,
                       lag_pairs: np.ndarray | None = None) -> float:
    """Effective number of independent averages of an overlapped Welch estimate.

    For Gaussian noise with a spectrum flat over a bin, ``Var(P) / S^2 = (1/K) [1 + 2 sum_{j=1}^{K-1}
    (1 - j/K) rho(j)]`` with ``rho(j) = (sum_n w[n] w[n + j*step])^2 / (sum w^2)^2``. Welch (1967), eq. for
    the variance of the overlapped estimate; also Percival & Walden (1993), Spectral Analysis for Physical
    Applications, eq. (292b). Returns ``S^2 / Var(P)``.

    When some segments of the grid were left out, ``K - j`` (the pairs of averaged segments ``j`` steps
    apart) becomes ``lag_pairs[j - 1]``: the variance of a mean of K periodograms is
    ``S^2 (K + 2 sum_j n_j rho(j)) / K^2`` whichever pairs are present.
    """
    w = np.asarray(window, float)
    n = len(w)
    energy = float(np.sum(w ** 2))
    if lag_pairs is not None:
        total = float(n_segments)
        for j, pairs in enumerate(lag_pairs, start=1):
            shift = j * step
            if shift >= n:
                break
            total += 2.0 * float(pairs) * (float(np.dot(w[: n - shift], w[shift:])) / energy) ** 2
        return n_segments ** 2 / total if n_segments else 0.0
    total = 1.0
    for j in range(1, n_segments):
        shift = j * step
        if shift >= n:
            break
        rho = (float(np.dot(w[: n - shift], w[shift:])) / energy) ** 2
        total += 2.0 * (1.0 - j / n_segments) * rho
    return n_segments / total


def bin_correlation(window: np.ndarray, max_lag: int = 8, tol: float = 1e-6) -> np.ndarray:
    """Correlation of periodogram powers ``d`` bins apart, for Gaussian noise with a locally flat spectrum.

    ``rho(d) = |sum_n w[n]^2 exp(-2 pi i n d / N)|^2 / (sum w^2)^2`` (Percival & Walden 1993, section 6.6).
    Returned for d = 0, 1, ... up to the last lag above ``tol`` (at most ``max_lag``); 1, 0.444, 0.028 for
    the Hann window.
    """
    w2 = np.asarray(window, float) ** 2
    spectrum = np.abs(np.fft.rfft(w2)) ** 2 / np.sum(w2) ** 2
    rho = spectrum[: max_lag + 1]
    keep = np.nonzero(rho > tol)[0]
    return rho[: (keep.max() + 1 if len(keep) else 1)].copy()


def default_segment_samples(sample_rate_hz: float, n_samples: int | None) -> int:
    """Default Welch segment: a power of two near 0.25 s, shortened so that at least ~16 segments fit.

    A quarter of a second resolves 4 Hz, which separates the mains harmonics (50/60 Hz apart) from the
    floor and reaches the 1/f corner, while a long recording still averages hundreds of segments and the
    transforms stay small enough to be fast (2^18 points at 1 MHz).
    """
    target = max(256, int(round(0.25 * sample_rate_hz)))
    nperseg = 1 << int(round(math.log2(target)))
    if n_samples is not None:
        while nperseg > 256 and n_samples < 8 * nperseg:  # 8 segment lengths ~ 15 segments at 50 % overlap
            nperseg //= 2
    return nperseg


class WelchAccumulator:
    """Streaming Welch estimate: feed chunks, get the same PSD as ``scipy.signal.welch`` on the whole.

    Parameters
    ----------
    sample_rate_hz : float
        Sampling rate, Hz.
    nperseg : int
        Segment length, samples.
    noverlap : int, optional
        Overlap, samples (default ``nperseg // 2``).
    window : str
        Window name (default ``"hann"``, periodic, as in ``scipy.signal.welch``).
    detrend : {"constant", "linear", False}
        Per-segment detrending.
    engine : {"fft", "scipy"}
        ``"scipy"``: each block of whole segments goes to ``scipy.signal.welch``. ``"fft"`` (default): the
        same computation (detrend, window, ``scipy.fft.rfft``, density scaling, one-sided) on batches of
        segments, about twice as fast; both equal ``scipy.signal.welch`` on the whole array to float
        tolerance (tested).
    exclude : (starts, ends), optional
        Sorted, disjoint sample intervals ``[start, end)`` (absolute indices from the first sample fed)
        that hold events: a segment overlapping any of them is left out of the average (see
        :mod:`impactline.noise.events`). None or empty: every segment is averaged, exactly as without.

    Notes
    -----
    Each :meth:`update` takes the buffered samples that hold whole segments (segments start at multiples
    of the step, as in one pass over the whole array), adds their periodograms to a running sum, and keeps
    the samples from the next segment start on. Memory: one chunk plus one segment.
    """

    def __init__(self, sample_rate_hz: float, nperseg: int, noverlap: int | None = None, window: str = "hann",
                 detrend: str | bool = "constant", engine: str = "fft",
                 exclude: tuple[np.ndarray, np.ndarray] | None = None):
        if not sample_rate_hz > 0:
            raise ValueError(f"sample rate must be > 0 Hz, got {sample_rate_hz!r}")
        nperseg = int(nperseg)
        if nperseg < 8:
            raise ValueError(f"segment length must be at least 8 samples, got {nperseg}")
        noverlap = nperseg // 2 if noverlap is None else int(noverlap)
        if not 0 <= noverlap < nperseg:
            raise ValueError(f"overlap must be from 0 to {nperseg - 1} samples (segment - 1), got {noverlap}")
        if detrend not in ("constant", "linear", False):
            raise ValueError(f"detrend must be 'constant', 'linear' or False, got {detrend!r}")
        if engine not in ("fft", "scipy"):
            raise ValueError(f"engine must be 'fft' or 'scipy', got {engine!r}")
        self.sample_rate_hz = float(sample_rate_hz)
        self.nperseg = nperseg
        self.noverlap = noverlap
        self.step = nperseg - noverlap
        self.window = window
        self.detrend = detrend
        self.engine = engine
        self._window = signal.get_window(window, nperseg)  # periodic form, as scipy.signal.welch uses
        self._window_energy = float(np.sum(self._window ** 2))
        self._freqs = np.fft.rfftfreq(nperseg, 1.0 / self.sample_rate_hz)
        self._buffer = np.empty(0)
        self._sum: np.ndarray | None = None
        self.n_segments = 0  # averaged
        self.n_segments_total = 0  # on the grid, averaged or left out
        self.n_seen = 0
        self._sum_x = 0.0  # running sum of samples used, for the mean current
        self._exclude = None
        if exclude is not None and len(exclude[0]):
            starts, ends = (np.asarray(a, dtype=np.int64) for a in exclude)
            if starts.shape != ends.shape or np.any(ends <= starts) or np.any(starts[1:] < ends[:-1]):
                raise ValueError("exclude must be sorted, disjoint intervals (starts, ends) with end > start")
            self._exclude = (starts, ends)
        # Pairs of averaged segments j = 1, 2, ... steps apart (only overlapping lags matter), the flags
        # of the last few segments, and the samples the averaged segments cover.
        self._max_lag = (nperseg - 1) // self.step
        self._lag_pairs = np.zeros(self._max_lag, dtype=np.int64)
        self._recent = np.zeros(self._max_lag, dtype=bool)
        self._last_kept = -1
        self.used_samples = 0

    def update(self, chunk: np.ndarray) -> None:
        """Add the next chunk of samples (A)."""
        chunk = np.asarray(chunk, dtype=float)
        if chunk.ndim != 1:
            raise ValueError(f"chunks must be 1-D arrays of samples, got shape {chunk.shape}")
        self.n_seen += len(chunk)
        buffer = np.concatenate((self._buffer, chunk)) if len(self._buffer) else chunk
        if len(buffer) < self.nperseg:
            self._buffer = buffer.copy()
            return
        count = (len(buffer) - self.noverlap) // self.step
        keep = self._kept(self.n_segments_total, count)
        # Runs of consecutive averaged segments: each run is one block of samples, so with nothing left out
        # the whole buffer goes through in one call, exactly as before exclusion existed.
        edges = np.flatnonzero(np.diff(np.concatenate(([False], keep, [False])).astype(np.int8)))
        for first, stop in zip(edges[::2], edges[1::2], strict=True):
            block_sum = self._block_sum(buffer[first * self.step: (stop - 1) * self.step + self.nperseg],
                                        int(stop - first))
            if self._sum is None:
                self._sum = block_sum
            else:
                self._sum += block_sum
        self._count_kept(self.n_segments_total, keep)
        self._sum_x += float(np.sum(buffer[: count * self.step]))
        self.n_segments += int(np.count_nonzero(keep))
        self.n_segments_total += count
        self._buffer = buffer[count * self.step:].copy()

    def _kept(self, first: int, count: int) -> np.ndarray:
        """Which of segments ``first .. first + count - 1`` are averaged (overlap no excluded interval)."""
        if self._exclude is None:
            return np.ones(count, dtype=bool)
        seg_start = (first + np.arange(count, dtype=np.int64)) * self.step
        return ~overlaps_intervals(seg_start, self.nperseg, *self._exclude)

    def _count_kept(self, first: int, keep: np.ndarray) -> None:
        """Update the pair counts per lag and the samples covered by averaged segments."""
        flags = np.concatenate((self._recent, keep))
        m = self._max_lag
        for j in range(1, m + 1):
            self._lag_pairs[j - 1] += int(np.count_nonzero(flags[m:] & flags[m - j: len(flags) - j]))
        if m:
            self._recent = flags[-m:].copy()
        index = first + np.flatnonzero(keep)
        if len(index):
            previous = np.concatenate(([self._last_kept], index[:-1]))
            gaps = np.where(previous >= 0, (index - previous) * self.step, self.nperseg)
            self.used_samples += int(np.sum(np.minimum(gaps, self.nperseg)))
            self._last_kept = int(index[-1])

    def _block_sum(self, block: np.ndarray, count: int) -> np.ndarray:
        """Sum of the periodograms of the ``count`` segments of ``block``."""
        if self.engine == "scipy":
            _, mean_psd = signal.welch(block, fs=self.sample_rate_hz, window=self.window,
                                       nperseg=self.nperseg, noverlap=self.noverlap, detrend=self.detrend,
                                       return_onesided=True, scaling="density", average="mean")
            return mean_psd * count
        return self._periodogram_sum(block)

    def _periodogram_sum(self, block: np.ndarray) -> np.ndarray:
        """Sum of the one-sided density periodograms of the segments of ``block`` (scipy.signal.welch's
        detrending, window and scaling; segments batched to about 16 MB at a time)."""
        segments = np.lib.stride_tricks.sliding_window_view(block, self.nperseg)[:: self.step]
        total = np.zeros(self.nperseg // 2 + 1)
        batch = max(1, (1 << 21) // self.nperseg)
        work = np.empty((min(batch, len(segments)), self.nperseg))
        for start in range(0, len(segments), batch):
            part = segments[start:start + batch]
            buf = work[: len(part)]
            if self.detrend == "constant":
                np.subtract(part, part.mean(axis=1, keepdims=True), out=buf)
            elif self.detrend == "linear":
                buf[...] = signal.detrend(part, axis=1, type="linear")
            else:
                buf[...] = part
            buf *= self._window
            spectrum = sp_fft.rfft(buf, axis=1)
            total += np.einsum("ij,ij->j", spectrum.real, spectrum.real)
            total += np.einsum("ij,ij->j", spectrum.imag, spectrum.imag)
        # Density scaling 1 / (fs sum w^2); one-sided: double all but DC (and Nyquist for even lengths).
        total *= 1.0 / (self.sample_rate_hz * self._window_energy)
        total[1:-1 if self.nperseg % 2 == 0 else None] *= 2.0
        return total

    def result(self) -> Spectrum:
        """The averaged spectrum so far.

        Raises
        ------
        ValueError
            When fewer samples than one segment were seen.
        """
        if self._sum is None:
            if self.n_segments_total:
                raise ValueError(f"all {self.n_segments_total} segments of {self.nperseg} samples hold events; "
                                 "use a shorter segment, or keep the events")
            raise ValueError(
                f"only {self.n_seen} samples, fewer than one segment of {self.nperseg}; "
                "use a shorter segment"
            )
        # Samples covered: all segment steps plus the tail of the last segment.
        n_used = self.n_segments_total * self.step + self.noverlap
        tail = self._buffer[: self.noverlap]
        mean = (self._sum_x + float(np.sum(tail))) / n_used
        partial = self.n_segments < self.n_segments_total
        return Spectrum(freqs_hz=self._freqs.copy(), psd=self._sum / self.n_segments,
                        sample_rate_hz=self.sample_rate_hz, nperseg=self.nperseg, noverlap=self.noverlap,
                        window=self.window, detrend=self.detrend, n_segments=self.n_segments,
                        n_samples=n_used, mean_A=mean, n_segments_total=self.n_segments_total,
                        used_samples=self.used_samples, lag_pairs=self._lag_pairs.copy() if partial else None)


def overlaps_intervals(seg_start: np.ndarray, length: int, starts: np.ndarray, ends: np.ndarray) -> np.ndarray:
    """Whether each span ``[seg_start, seg_start + length)`` overlaps one of the sorted, disjoint intervals
    ``[starts, ends)`` (sample indices)."""
    nxt = np.searchsorted(ends, seg_start, side="right")  # first interval ending after the span starts
    hit = nxt < len(ends)
    hit[hit] = starts[nxt[hit]] < seg_start[hit] + length
    return hit


def welch_spectrum(chunks: Iterable[np.ndarray] | np.ndarray, sample_rate_hz: float, *, nperseg: int,
                   noverlap: int | None = None, window: str = "hann", detrend: str | bool = "constant",
                   engine: str = "fft", exclude: tuple[np.ndarray, np.ndarray] | None = None) -> Spectrum:
    """One-sided PSD (A^2/Hz) of a recording given as an array or as an iterable of chunks.

    Parameters
    ----------
    chunks : ndarray or iterable of ndarray
        Current samples, A.
    sample_rate_hz : float
        Sampling rate, Hz.
    nperseg, noverlap, window, detrend, engine, exclude
        As :class:`WelchAccumulator`.

    Returns
    -------
    Spectrum
    """
    acc = WelchAccumulator(sample_rate_hz, nperseg, noverlap, window, detrend, engine, exclude)
    if isinstance(chunks, np.ndarray):
        chunks = (chunks,)
    for chunk in chunks:
        acc.update(chunk)
    return acc.result()


def _harmonic_bins(spec: Spectrum, mains_hz: float, tolerance_hz: float, f_max: float) -> list[tuple[int, int, int]]:
    """(harmonic, first bin, last bin + 1) of the search window around each mains harmonic below f_max."""
    df = spec.resolution_hz
    # A line within the tolerance of the harmonic peaks in the bin nearest to it: search the bins whose
    # centre lies within the tolerance plus half a bin (at a coarse resolution, one bin; a wider search
    # would take the rise of 1/f noise next to DC for a line).
    out = []
    for h in range(1, int(f_max // mains_hz) + 1):
        lo = max(1, int(math.ceil((h * mains_hz - tolerance_hz) / df - 0.5)))
        hi = min(len(spec.freqs_hz) - 1, int(math.floor((h * mains_hz + tolerance_hz) / df + 0.5)) + 1)
        if lo < hi:
            out.append((h, lo, hi))
    return out


def find_mains_peaks(spec: Spectrum, mains_hz: float | str = "auto", *, max_harmonic_hz: float | None = None,
                     false_alarm: float = 1e-4, tolerance_hz: float = 0.5) -> Spectrum:
    """Find mains lines (50 or 60 Hz and harmonics) and mask them in ``spec`` (modified in place).

    A bin near a harmonic is part of a line when it stands above the local floor by more than the
    ``1 - false_alarm`` quantile of the estimate's own scatter: a Welch bin is ``S * chi2(nu) / nu`` with
    ``nu = 2 * K_eff`` (Welch 1967). The floor the largest bin near each harmonic is tested against is the
    higher of the medians of the 15 bins on each side beyond the main lobe (DC left out; next to DC, the
    right side's power law extrapolated), corrected for the median of that distribution: a line stands
    above both sides, while a bin on a steep slope (1/f noise seen at a coarse resolution) stands above one
    side only. Lines are masked over the window's main lobe around each significant bin; ``spec.floor`` (a
    running median over 31 bins) replaces them in masked figures.

    Parameters
    ----------
    spec : Spectrum
        Spectrum to search (its ``mask``, ``floor``, ``mains_hz`` and ``mains_peaks`` are set).
    mains_hz : float or "auto"
        Mains frequency, Hz; ``"auto"`` tries 50 and 60 Hz and keeps the one with more significant lines
        (none if neither has any); 0 disables the search.
    max_harmonic_hz : float, optional
        Highest frequency searched, Hz (default: 2 kHz or Nyquist, whichever is lower).
    false_alarm : float
        Probability that a noise-only bin is taken for a line.
    tolerance_hz : float
        How far the line may sit from the nominal harmonic, Hz.

    Returns
    -------
    Spectrum
        ``spec`` itself.
    """
    nu = 2.0 * spec.effective_averages
    median_factor = float(stats.chi2.median(nu) / nu)
    floor = ndimage.median_filter(spec.psd, size=31, mode="nearest") / median_factor
    spec.floor = floor
    threshold = float(stats.chi2.isf(false_alarm, nu) / nu)
    nyquist = spec.sample_rate_hz / 2.0
    f_max = min(nyquist, 2000.0) if max_harmonic_hz is None else min(nyquist, float(max_harmonic_hz))
    candidates = (50.0, 60.0) if mains_hz == "auto" else ((float(mains_hz),) if float(mains_hz) > 0 else ())
    best: tuple[int, float, np.ndarray, list[MainsPeak]] = (0, 0.0, np.zeros(spec.psd.shape, bool), [])
    df = spec.resolution_hz
    lobe = 2  # Hann main lobe half-width in bins; wider windows still have their peak within +-2 bins
    tiny = np.finfo(float).tiny
    for f0 in candidates:
        mask = np.zeros(spec.psd.shape, bool)
        peaks = []
        for harmonic, lo, hi in _harmonic_bins(spec, f0, tolerance_hz, f_max):
            k = lo + int(np.argmax(spec.psd[lo:hi]))
            ratio = spec.psd[k] * median_factor / max(_line_floor(spec.psd, k, lobe), tiny)
            # A line is a local maximum; the main lobe of a strong neighbour leaning into the window is not.
            local_max = spec.psd[k] >= spec.psd[k - 1] and spec.psd[k] >= spec.psd[min(k + 1, len(mask) - 1)]
            # At a coarse resolution two harmonics' search windows can share a bin: count a line once.
            if ratio <= threshold or not local_max or mask[k]:
                continue
            a, b = max(1, k - lobe), min(len(mask), k + lobe + 1)
            mask[a:b] = True
            excess = np.clip(spec.psd[a:b] - floor[a:b], 0.0, None)
            peaks.append(MainsPeak(harmonic=harmonic, frequency_hz=float(spec.freqs_hz[k]),
                                   excess_psd_A2_per_Hz=float(spec.psd[k] - floor[k]),
                                   line_rms_A=float(math.sqrt(np.sum(excess) * df)),
                                   significance=float(ratio)))
        if len(peaks) > best[0]:
            best = (len(peaks), f0, mask, peaks)
    spec.mask = best[2]
    spec.mains_hz = best[1]
    spec.mains_peaks = best[3]
    return spec


def _line_floor(psd: np.ndarray, k: int, lobe: int, width: int = 15, least: int = 3) -> float:
    """Floor a line at bin ``k`` must stand above: the higher of the medians of up to ``width`` bins left of
    ``k - lobe`` (from bin 1: DC left out) and right of ``k + lobe``. A line stands above both sides; a bin
    on a steep slope (1/f noise at a coarse resolution) stands above one only. Next to DC, where the left
    side has fewer than ``least`` bins, the right side's two halves give the local power law
    ``psd ~ f^-a`` (``0 <= a <= 2``), extrapolated down to ``k``."""
    left = psd[max(1, k - lobe - width): max(1, k - lobe)]
    first = k + lobe + 1
    right = psd[first: first + width]
    if len(right) < 2 * least:
        return math.inf
    if len(left) >= least:
        return float(max(np.median(left), np.median(right)))
    half = len(right) // 2
    near, far = float(np.median(right[:half])), float(np.median(right[half:]))
    f_near, f_far = first + (half - 1) / 2.0, first + half + (len(right) - half - 1) / 2.0  # window centres, bins
    if near <= 0 or far <= 0:
        return near
    slope = min(max(math.log(near / far) / math.log(f_far / f_near), 0.0), 2.0)
    return near * (f_near / k) ** slope


def band_rms(spec: Spectrum, f_lo_hz: float = 0.0, f_hi_hz: float | None = None, *, masked: bool = True) -> float:
    """rms current (A) in the band ``[f_lo_hz, f_hi_hz]``: square root of the PSD integrated over the bins.

    Bins are rectangles of width ``fs / nperseg`` centred on their frequency (the DC and Nyquist bins are
    half-width), so the whole band integrates to the mean square of the detrended segments (Parseval;
    exactly ``mean(x**2)`` for a boxcar window without detrending). ``masked`` replaces bins under mains
    lines by the local floor.
    """
    f_hi = spec.sample_rate_hz / 2.0 if f_hi_hz is None else float(f_hi_hz)
    if f_hi < f_lo_hz:
        raise ValueError(f"band upper edge {f_hi} Hz is below the lower edge {f_lo_hz} Hz")
    weights = _bin_overlap(spec, float(f_lo_hz), f_hi)
    return float(math.sqrt(max(np.dot(_integrand(spec, masked), weights), 0.0)))


def _integrand(spec: Spectrum, masked: bool) -> np.ndarray:
    """One-sided density to integrate over the bin rectangles.

    ``scipy.signal.welch`` does not double the DC bin (nor the Nyquist bin of an even segment); their
    rectangles are half as wide, [0, df/2] and [fs/2 - df/2, fs/2], so they count twice per Hz.
    """
    out = np.array(spec.masked_psd if masked else spec.psd, dtype=float)
    out[0] *= 2.0
    if spec.nperseg % 2 == 0:
        out[-1] *= 2.0
    return out


def _bin_overlap(spec: Spectrum, f_lo: float, f_hi: float) -> np.ndarray:
    """Width (Hz) of each bin's rectangle that falls inside [f_lo, f_hi]."""
    df = spec.resolution_hz
    left = np.maximum(spec.freqs_hz - df / 2.0, 0.0)
    right = np.minimum(spec.freqs_hz + df / 2.0, spec.sample_rate_hz / 2.0)
    return np.clip(np.minimum(right, f_hi) - np.maximum(left, f_lo), 0.0, None)


def cumulative_rms(spec: Spectrum, *, masked: bool = True) -> np.ndarray:
    """rms current (A) from 0 Hz up to the upper edge of each bin (integrated spectrum)."""
    widths = _bin_overlap(spec, 0.0, spec.sample_rate_hz / 2.0)
    return np.sqrt(np.cumsum(_integrand(spec, masked) * widths))
