"""Wavelet denoising (PyWavelets), block-wise with overlapping margins so chunked equals whole exactly.

Method
------
The recording is cut into fixed blocks of ``B`` samples at absolute positions (block ``k`` covers samples
``kB .. kB+B-1``, whatever the chunking). Each block is transformed together with a margin of ``m``
samples on both sides (real neighbouring samples; the recording mirrored at its two ends), the detail
coefficients are thresholded, the window is transformed back and its central ``B`` samples are emitted.

* ``transform = "stationary"``: undecimated (stationary) transform, ``pywt.swt``/``pywt.iswt`` with
  ``norm=True`` (white noise keeps its variance at every level); shift-invariant, fewer artefacts.
  ``"discrete"``: ``pywt.wavedec``/``waverec`` with ``mode="periodization"`` (orthonormal).
* The margin ``m`` covers the support of the level-``J`` analysis and synthesis filters,
  ``2 (2^J - 1)(L - 1)`` samples for a wavelet of filter length ``L``, rounded up to a multiple of ``2^J``
  (block starts then fall on the decimation grid of every level). Within that reach the coefficients that
  shape a block's central samples are those of a transform of the whole recording; the window's own
  edges never reach the emitted samples.
* Thresholds are data-dependent, so they are made block-stable: they are estimated for each fixed
  absolute block from that block's own coefficients (those whose centres fall inside the block, margins
  excluded), so every sample contributes to exactly one estimate and the result cannot depend on where
  chunks begin. Noise: ``sigma = median(|d|) / 0.6744898`` (Donoho & Johnstone 1994), per level
  (``noise = "per-level"``, robust to coloured noise) or from the finest level for all (``"finest"``).
* Rules, per level ``j`` with ``n_j`` coefficients: ``universal`` ``sigma_j sqrt(2 ln B)`` (VisuShrink,
  Donoho & Johnstone 1994, with the block length as n); ``sure`` the SURE minimiser below
  ``sqrt(2 ln n_j)`` with the hybrid fall-back to it for sparse levels (SureShrink, Donoho & Johnstone
  1995); ``bayes`` ``sigma_j^2 / sigma_x`` (BayesShrink, Chang, Yu & Vetterli 2000). ``hard`` (default,
  keeps event heights) or ``soft``.
  Approximation coefficients (the slow part, the baseline) are never thresholded.

Latency and memory: one block plus one margin of samples.
"""

from __future__ import annotations

import difflib
import functools
import math
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
import pywt
from impactline import Filter, FilterInfo, Param, ParameterError
from impactline.units import format_quantity

from ._edges import StreamBuffer

__all__ = [
    "Wavelet",
    "NORMAL_MAD",
    "mad_sigma",
    "universal_threshold",
    "sure_risk",
    "sure_threshold",
    "bayes_threshold",
    "apply_threshold",
    "wavelet_margin",
]

#: Median of |N(0, 1)| = Phi^-1(3/4): sigma = median(|d|) / 0.6744897501960817 (Donoho & Johnstone 1994).
NORMAL_MAD = 0.6744897501960817
#: Fewest coefficients per level in a block for a usable noise estimate.
_MIN_COEFFICIENTS = 16


# ----------------------------------------------------------------------------------- threshold rules
def mad_sigma(d: np.ndarray) -> float:
    """Noise standard deviation from detail coefficients: ``median(|d|) / 0.6744898``.

    Donoho & Johnstone (1994), "Ideal spatial adaptation by wavelet shrinkage", Biometrika 81:425-455.
    """
    return float(np.median(np.abs(d)) / NORMAL_MAD) if len(d) else 0.0


def universal_threshold(n: int, sigma: float = 1.0) -> float:
    """Universal threshold ``sigma sqrt(2 ln n)`` (Donoho & Johnstone 1994)."""
    return float(sigma * math.sqrt(2.0 * math.log(n)))


def sure_risk(x: np.ndarray, t: float) -> float:
    """Stein's unbiased risk estimate of soft thresholding at ``t`` for unit-variance data ``x``.

    ``SURE(t) = d - 2 #{|x_i| <= t} + sum(min(|x_i|, t)^2)`` (Donoho & Johnstone 1995, "Adapting to unknown
    smoothness via wavelet shrinkage", JASA 90:1200-1224).
    """
    a = np.abs(np.asarray(x, dtype=float))
    return float(a.size - 2 * np.count_nonzero(a <= t) + np.sum(np.minimum(a, t) ** 2))


def sure_threshold(x: np.ndarray, hybrid: bool = True) -> float:
    """SureShrink threshold for unit-variance coefficients ``x`` (multiply by sigma to use it).

    The SURE minimiser over ``t`` in ``{0, |x_i|}`` not above the universal threshold ``sqrt(2 ln d)``. With
    ``hybrid``, levels too sparse for SURE to be reliable, ``(sum x^2 - d)/d <= (log2 d)^1.5 / sqrt(d)``,
    get the universal threshold (Donoho & Johnstone 1995).
    """
    a = np.abs(np.asarray(x, dtype=float))
    d = a.size
    if d == 0:
        return 0.0
    universal = math.sqrt(2.0 * math.log(d)) if d > 1 else 0.0
    if hybrid and d > 1 and (np.sum(a**2) - d) / d <= math.log2(d) ** 1.5 / math.sqrt(d):
        return universal
    squares = np.sort(a) ** 2
    k = np.arange(1, d + 1)
    # SURE at t = k-th smallest |x|: d - 2k + sum of the k smallest x^2 + (d - k) t^2; t = 0 gives d.
    risks = d - 2 * k + np.cumsum(squares) + (d - k) * squares
    allowed = squares <= universal**2
    if not np.any(allowed) or np.min(risks[allowed]) >= d:
        return 0.0
    best = int(np.argmin(np.where(allowed, risks, np.inf)))
    return float(math.sqrt(squares[best]))


def bayes_threshold(y: np.ndarray, sigma: float) -> float:
    """BayesShrink threshold ``sigma^2 / sigma_x``, ``sigma_x = sqrt(max(mean(y^2) - sigma^2, 0))``.

    When ``sigma_x = 0`` the threshold is ``max|y|`` (the level is pure noise and is removed). Chang, Yu &
    Vetterli (2000), IEEE Trans. Image Processing 9:1532-1546.
    """
    y = np.asarray(y, dtype=float)
    sigma_x = math.sqrt(max(float(np.mean(y**2)) - sigma**2, 0.0))
    if sigma_x == 0.0:
        return float(np.max(np.abs(y)))
    return sigma**2 / sigma_x


def apply_threshold(d: np.ndarray, t: float, rule: str) -> np.ndarray:
    """Soft (``sign(d) max(|d| - t, 0)``) or hard (``d`` where ``|d| > t``, else 0) thresholding."""
    magnitude = np.abs(d)
    if rule == "soft":
        return np.sign(d) * np.maximum(magnitude - t, 0.0)
    if rule == "hard":
        return np.where(magnitude > t, d, 0.0)
    raise ValueError(f"thresholding must be 'soft' or 'hard', got {rule!r}")


# ----------------------------------------------------------------------------------- blocks
def wavelet_margin(wavelet: str, level: int) -> int:
    """Samples of real context on each side of a block: ``2 (2^J - 1)(L - 1)`` rounded up to ``2^J``."""
    step = 2**level
    reach = 2 * (step - 1) * (pywt.Wavelet(wavelet).dec_len - 1)
    return max(step, -(-reach // step) * step)


@dataclass(frozen=True)
class _Plan:
    wavelet: str
    level: int
    stationary: bool
    rule: str
    thresholding: str
    per_level_noise: bool
    block: int          # B, samples, a multiple of 2**level
    margin: int         # m, samples, a multiple of 2**level

    def decompose(self, window: np.ndarray) -> list[np.ndarray]:
        """[approximation, detail J, ..., detail 1]."""
        if self.stationary:
            return pywt.swt(window, self.wavelet, level=self.level, trim_approx=True, norm=True)
        return pywt.wavedec(window, self.wavelet, mode="periodization", level=self.level)

    def reconstruct(self, coeffs: list[np.ndarray]) -> np.ndarray:
        if self.stationary:
            return pywt.iswt(coeffs, self.wavelet, norm=True)
        return pywt.waverec(coeffs, self.wavelet, mode="periodization")

    def thresholds(self, coeffs: list[np.ndarray], valid: int) -> list[float]:
        """Threshold of each detail level (J .. 1) from the coefficients of the block's ``valid`` samples."""
        details = coeffs[1:]
        own = []
        for i, d in enumerate(details):
            scale = 1 if self.stationary else 2 ** (self.level - i)  # decimation of detail level J - i
            lo = self.margin // scale
            own.append(d[lo:lo + max(1, -(-valid // scale))])
        finest = None if self.per_level_noise else mad_sigma(own[-1])
        out = []
        for d in own:
            sigma = mad_sigma(d) if finest is None else finest
            if sigma == 0.0:
                out.append(0.0)
            elif self.rule == "universal":
                out.append(universal_threshold(self.block, sigma))
            elif self.rule == "sure":
                out.append(sigma * sure_threshold(d / sigma))
            else:
                out.append(bayes_threshold(d, sigma))
        return out

    def denoise(self, window: np.ndarray, valid: int) -> np.ndarray:
        """Denoise one window (block plus margins); return its central ``valid`` samples."""
        coeffs = self.decompose(window)
        limits = self.thresholds(coeffs, valid)
        shrunk = [coeffs[0]] + [apply_threshold(d, t, self.thresholding) for d, t in zip(coeffs[1:], limits,
                                                                                       strict=True)]
        return self.reconstruct(shrunk)[self.margin:self.margin + valid]


@dataclass
class _WaveletState:
    plan: _Plan
    samples: StreamBuffer = field(default_factory=StreamBuffer)
    next_block: int = 0

    def emit(self, n: int | None) -> np.ndarray:
        """Denoise every block whose window has arrived (all remaining blocks once the length n is known)."""
        plan, buf = self.plan, self.samples
        b, m = plan.block, plan.margin
        out = []
        while True:
            lo = self.next_block * b
            if n is None:
                if lo + b + m > buf.received:
                    break
                valid = b
            else:
                if lo >= n:
                    break
                valid = min(b, n - lo)
            out.append(plan.denoise(buf.segment(lo - m, lo + b + m, n), valid))
            self.next_block += 1
        buf.drop_before(max(self.next_block * b - m, 0))
        return np.concatenate(out) if out else np.empty(0)


@functools.lru_cache(maxsize=64)
def _known_wavelets() -> tuple[str, ...]:
    return tuple(pywt.wavelist(kind="discrete"))


class Wavelet(Filter):
    """Wavelet shrinkage denoising, block-wise with margins (exact chunked = whole).

    Parameters
    ----------
    wavelet : str
        PyWavelets discrete wavelet name (default ``"sym4"``; e.g. ``"haar"``, ``"db4"``, ``"coif3"``).
    level : int
        Decomposition levels J, 1-12 (default 5). Details of levels 1..J are thresholded; the band below
        about ``fs / 2^(J+1)`` is kept as is.
    transform : {"stationary", "discrete"}
        Undecimated (shift-invariant, default) or decimated orthonormal transform.
    threshold : {"universal", "sure", "bayes"}
        Threshold rule (default ``"universal"``).
    thresholding : {"hard", "soft"}
        Keep or remove each coefficient whole (``hard``, default: event heights are kept) or shrink every
        kept coefficient by the threshold (``soft``).
    noise : {"per-level", "finest"}
        Noise estimate per level (default) or from the finest level only.
    block : float
        Block over which thresholds are estimated, s (default 0.1 s); rounded up to a multiple of 2^J
        samples and holding at least 16 coefficients per level.

    Notes
    -----
    Not linear: ``frequency_response`` is None; ``info()`` reports no cutoff and no delay.
    """

    name: ClassVar[str] = "wavelet"
    summary: ClassVar[str] = "wavelet shrinkage denoising (universal, SURE or BayesShrink thresholds)"
    version: ClassVar[str] = "1"
    params: ClassVar[dict[str, Param]] = {
        "wavelet": Param("sym4", kind=str,
                         doc="PyWavelets discrete wavelet name, e.g. sym4, db4, haar, coif3"),
        "level": Param(5, kind=int, low=1, high=12,
                       doc="decomposition levels (details 1..level thresholded)"),
        "transform": Param("stationary", kind=str, choices=("stationary", "discrete"),
                           doc="stationary (undecimated, shift-invariant) or discrete (decimated) transform"),
        "threshold": Param("universal", kind=str, choices=("universal", "sure", "bayes"),
                           doc="threshold rule: universal (VisuShrink), sure (SureShrink hybrid), bayes"),
        "thresholding": Param("hard", kind=str, choices=("hard", "soft"),
                              doc="hard keeps peak heights (default); soft shrinks every kept coefficient"),
        "noise": Param("per-level", kind=str, choices=("per-level", "finest"),
                       doc="noise sigma from each level's MAD, or from the finest level for all"),
        "block": Param(0.1, unit="s", low=0, low_inclusive=False,
                       doc="fixed block over which thresholds are estimated (rounded to 2^level samples)"),
    }

    def __init__(self, **values: Any):
        super().__init__(**values)
        if self.wavelet not in _known_wavelets():
            near = difflib.get_close_matches(self.wavelet, _known_wavelets(), n=3)
            hint = f"did you mean {' or '.join(repr(w) for w in near)}? " if near else ""
            raise ParameterError(f"filter {self.name!r}", "wavelet",
                                 f"{self.wavelet!r} is not a discrete wavelet of PyWavelets; {hint}"
                                 "see pywt.wavelist(kind='discrete')")

    def plan(self, sample_rate_hz: float) -> _Plan:
        """Block length, margin and rules at this rate; raises ``ParameterError`` if the block is short."""
        step = 2**self.level
        block = max(step, -(-round(self.block * sample_rate_hz) // step) * step)
        coefficients = block // step
        if coefficients < _MIN_COEFFICIENTS:
            shortest = _MIN_COEFFICIENTS * step / sample_rate_hz
            raise ParameterError(
                f"filter {self.name!r}", "block",
                f"{format_quantity(self.block, 's')} = {block} samples at "
                f"{format_quantity(sample_rate_hz, 'Hz')} leaves {coefficients} coefficients at level "
                f"{self.level}, fewer than the {_MIN_COEFFICIENTS} needed to estimate the noise; "
                f"use block >= {format_quantity(shortest, 's')} or a lower level")
        return _Plan(self.wavelet, self.level, self.transform == "stationary", self.threshold,
                     self.thresholding, self.noise == "per-level", block,
                     wavelet_margin(self.wavelet, self.level))

    def start(self, sample_rate_hz: float) -> _WaveletState:
        """Initial state (validates the block length)."""
        return _WaveletState(self.plan(sample_rate_hz))

    def process(self, x: np.ndarray, state: _WaveletState) -> tuple[np.ndarray, _WaveletState]:
        """Append a chunk; emit every block whose right margin has arrived."""
        state.samples.append(np.asarray(x, dtype=np.float64))
        return state.emit(None), state

    def finish(self, state: _WaveletState) -> np.ndarray:
        """Emit the remaining blocks, the recording mirrored at its end."""
        received = state.samples.received
        return state.emit(received) if received else np.empty(0)

    def info(self, sample_rate_hz: float) -> FilterInfo:
        """No cutoff or rise time (not linear), no delay."""
        return FilterInfo(cutoff_hz=None, rise_time_s=None, delay_s=0.0)
