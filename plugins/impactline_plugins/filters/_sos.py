"""Streaming engine shared by the linear (second-order-sections) filters: causal and zero-phase.

Causal mode runs ``scipy.signal.sosfilt`` with its state carried from chunk to chunk, which makes the
chunked result identical to the one-pass result.

Zero-phase mode runs the same filter forward (state carried) and then backward. The backward pass of an
endless stream would start at the end of the recording, so a chunk's samples cannot be final before the
rest has been read. Instead, every chunk is filtered backward from the newest forward output, starting
there in the steady state of that sample, and the newest ``margin`` samples are held back; their values
are recomputed with the next chunk. The margin is the length after which the filter's impulse response
has decayed below ``1e-12`` of its total absolute sum, so the start-up error of the backward pass is below
that fraction of the signal's variation by the time a sample is emitted. At the true end of the recording
the backward pass starts from the last sample in its steady state, exactly as in the one-pass result.

Ends of the recording: the forward pass starts in the steady state of the first sample and the backward
pass in the steady state of the last (the filter "has seen" the end values forever), so a baseline of
e.g. 1 nA does not produce a start-up transient.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import ClassVar

import numpy as np
from impactline import Filter
from scipy import signal

__all__ = ["SosDesign", "SosState", "SosFilter", "decay_samples", "group_delay_samples"]

#: Relative size of the impulse-response tail beyond the zero-phase margin.
TAIL_TOLERANCE = 1e-12


def decay_samples(sos: np.ndarray, tolerance: float = TAIL_TOLERANCE) -> int:
    """Samples after which the impulse response's remaining absolute sum is below ``tolerance`` of its total.

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6)
        Second-order sections of a stable filter.
    tolerance : float
        Relative size of the tail that may be neglected.

    Returns
    -------
    int
        Number of samples (at least 1).
    """
    poles = np.concatenate([np.roots(section[3:]) for section in sos])
    radius = float(np.max(np.abs(poles))) if poles.size else 0.0
    if radius >= 1.0:
        raise ValueError(f"the filter is not stable (largest pole radius {radius:.6g} >= 1)")
    # The slowest mode decays as radius**n; simulate well past where it reaches the tolerance (multiple
    # poles add a polynomial factor, hence the factor 2 and the extra samples).
    guess = 64 if radius == 0.0 else math.ceil(math.log(tolerance) / math.log(radius))
    length = 2 * guess + 64 * len(sos) + 64
    impulse = np.zeros(length)
    impulse[0] = 1.0
    h = np.abs(signal.sosfilt(sos, impulse))
    tail = np.cumsum(h[::-1])[::-1]  # tail[k] = sum of |h[k:]|
    beyond = np.flatnonzero(tail <= tolerance * tail[0])
    return int(beyond[0]) if beyond.size else length


def group_delay_samples(sos: np.ndarray, freq_hz: float = 0.0, sample_rate_hz: float = 1.0) -> float:
    """Group delay of a cascade of sections at one frequency, in samples.

    At DC it is exact from the coefficients: for each section sum(k b_k)/sum(b_k) - sum(k a_k)/sum(a_k)
    (the centroid of the impulse response); elsewhere ``scipy.signal.group_delay`` per section.
    """
    total = 0.0
    k = np.arange(3)
    for section in sos:
        b, a = section[:3], section[3:]
        if freq_hz == 0.0:
            total += float(np.dot(k, b) / np.sum(b) - np.dot(k, a) / np.sum(a))
        else:
            _, gd = signal.group_delay((b, a), w=[freq_hz], fs=sample_rate_hz)
            total += float(gd[0])
    return total


@dataclass(frozen=True)
class SosDesign:
    """A filter ready to stream: its sections, mode, and the zero-phase hold-back margin.

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6)
        Second-order sections of one pass.
    zero_phase : bool
        Forward then backward pass (magnitude squared, no phase) instead of one causal pass.
    margin : int
        Samples held back in zero-phase mode (0 in causal mode).
    zi_unit : ndarray
        Section states of the steady response to a constant 1 (``scipy.signal.sosfilt_zi``).
    """

    sos: np.ndarray
    zero_phase: bool
    margin: int
    zi_unit: np.ndarray = field(repr=False)

    @classmethod
    def build(cls, sos: np.ndarray, zero_phase: bool) -> SosDesign:
        """Prepare ``sos`` for streaming (steady-state start, margin from the impulse-response decay)."""
        sos = np.ascontiguousarray(sos, dtype=np.float64)
        margin = decay_samples(sos) if zero_phase else 0
        return cls(sos, zero_phase, margin, signal.sosfilt_zi(sos))

    def response(self, freqs_hz: np.ndarray, sample_rate_hz: float) -> np.ndarray:
        """Complex frequency response applied to the data (|H|^2, real, in zero-phase mode)."""
        _, h = signal.sosfreqz(self.sos, worN=np.asarray(freqs_hz, dtype=float), fs=sample_rate_hz)
        return (np.abs(h) ** 2).astype(complex) if self.zero_phase else h

    def backward(self, forward: np.ndarray) -> np.ndarray:
        """Backward pass over ``forward``, starting in the steady state of its last sample."""
        reversed_input = forward[::-1]
        out, _ = signal.sosfilt(self.sos, reversed_input, zi=self.zi_unit * reversed_input[0])
        return out[::-1]


@dataclass
class SosState:
    """Carried state: forward-pass filter state and (zero-phase) the forward output not yet emitted."""

    design: SosDesign
    zi: np.ndarray | None = None
    held: np.ndarray = field(default_factory=lambda: np.empty(0))


class SosFilter(Filter):
    """Base of linear filters made of second-order sections; subclasses implement :meth:`design`."""

    name: ClassVar[str] = ""

    def design(self, sample_rate_hz: float) -> SosDesign:  # pragma: no cover - abstract
        """Design the filter for this sample rate (validating against Nyquist)."""
        raise NotImplementedError

    def start(self, sample_rate_hz: float) -> SosState:
        """Initial state; raises ``ParameterError`` (a ValueError) when a frequency is beyond Nyquist."""
        return SosState(self.design(sample_rate_hz))

    def process(self, x: np.ndarray, state: SosState) -> tuple[np.ndarray, SosState]:
        """Filter the next chunk; in zero-phase mode the newest ``margin`` samples are held back."""
        x = np.asarray(x, dtype=np.float64)
        if x.size == 0:
            return np.empty(0), state
        design = state.design
        if state.zi is None:
            state.zi = design.zi_unit * x[0]
        forward, state.zi = signal.sosfilt(design.sos, x, zi=state.zi)
        if not design.zero_phase:
            return forward, state
        pending = np.concatenate([state.held, forward]) if state.held.size else forward
        ready = pending.size - design.margin
        # Each backward pass also runs over the margin; waiting until at least a margin of samples is
        # ready bounds that overhead for small chunks (values stay within the margin's tolerance).
        if ready < max(design.margin, 1):
            state.held = pending
            return np.empty(0), state
        out = design.backward(pending)[:ready]
        state.held = pending[ready:].copy()
        return out, state

    def finish(self, state: SosState) -> np.ndarray:
        """Emit the held-back samples, the backward pass now starting at the true end."""
        if state.held.size == 0:
            return np.empty(0)
        out = state.design.backward(state.held)
        state.held = np.empty(0)
        return out

    def frequency_response(self, freqs_hz: np.ndarray, sample_rate_hz: float) -> np.ndarray:
        """Complex response applied to the data at ``freqs_hz`` (|H|^2 in zero-phase mode)."""
        return self.design(sample_rate_hz).response(freqs_hz, sample_rate_hz)
