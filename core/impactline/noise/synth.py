"""Synthetic current noise with a chosen ``A/f + B + C f + D f^2`` spectrum, made in the time domain.

Used to check the spectrum, fit and detection limits end to end, and for benchmarks. Each term comes from
its own stream of Gaussian white noise (so the output does not depend on the chunk size) shaped by a
streaming filter whose exact discrete-time spectrum is known (:meth:`NoiseSynthesizer.psd`):

* white ``B``: white noise of variance ``B fs / 2`` (one-sided PSD ``2 sigma^2 / fs``);
* capacitive ``D f^2``: the physical mechanism, a white voltage ``e_n`` differentiated into the input
  capacitance, ``i = C dv/dt``; the derivative is the ideal discrete differentiator ``h[n] = fs (-1)^n / n``
  (Oppenheim & Schafer, Discrete-Time Signal Processing, section on ideal differentiators) with a
  Blackman window over 65 taps, within 2e-4 of ``j 2 pi f`` up to 0.4 fs;
* ``1/f``: a bank of first-order low-pass filters with corners three per decade from ``f_min`` to 0.45 fs,
  weights proportional to ``1/f_k``, whose sum of Lorentzians approximates the power law (Keshner 1982,
  Proc. IEEE 70:212; the weights follow from ``integral dx / (1 + x^2) = pi / 2``): within 1.5 % of
  ``A/f`` from 30 f_min to 0.1 fs, about -8 % to +14 % between 0.3 and 0.45 fs (a first-order
  discrete-time filter cannot follow a power law up to the Nyquist frequency);
* ``f`` (dielectric): a second such 1/f bank, differentiated like the capacitive term, so the same
  accuracy as the 1/f term.
"""

from __future__ import annotations

import math
from collections.abc import Iterator

import numpy as np
from scipy import signal

__all__ = ["NoiseSynthesizer"]

_DIFF_HALF = 32


def _differentiator(sample_rate_hz: float) -> np.ndarray:
    n = np.arange(-_DIFF_HALF, _DIFF_HALF + 1)
    h = np.zeros(len(n))
    nz = n != 0
    h[nz] = (-1.0) ** n[nz] / n[nz]
    return h * signal.get_window("blackman", len(n), fftbins=False) * sample_rate_hz


class NoiseSynthesizer:
    """Gaussian current noise whose one-sided PSD is ``A/f + B + C f + D f^2`` (A^2/Hz).

    Parameters
    ----------
    coefficients : sequence of 4 floats
        ``A`` (A^2), ``B`` (A^2/Hz), ``C`` (A^2/Hz^2), ``D`` (A^2/Hz^3); zero leaves a term out.
    sample_rate_hz : float
        Sampling rate, Hz.
    seed : int, optional
        Random seed (the same seed gives the same samples whatever the chunk size).
    f_min_hz : float, optional
        Lowest corner of the 1/f and f banks, Hz (default fs / 1e6); below it the 1/f term flattens.
    mean_A : float
        Constant current added, A.
    """

    def __init__(self, coefficients, sample_rate_hz: float, *, seed: int | None = None,
                 f_min_hz: float | None = None, mean_A: float = 0.0):
        self.coefficients = np.asarray(coefficients, float)
        if self.coefficients.shape != (4,) or np.any(self.coefficients < 0):
            raise ValueError(f"need 4 non-negative coefficients A, B, C, D; got {coefficients!r}")
        self.fs = float(sample_rate_hz)
        self.mean_A = float(mean_A)
        f_min = self.fs / 1e6 if f_min_hz is None else float(f_min_hz)
        # Corners from f_min up to 0.45 fs, three per decade.
        n_corners = max(2, int(math.ceil(3 * math.log10(0.45 * self.fs / f_min))) + 1)
        self.corners = np.geomspace(f_min, 0.45 * self.fs, n_corners)
        log_ratio = math.log(self.corners[1] / self.corners[0])
        # Lorentzian weights for a unit 1/f spectrum; the 1/f bank of the dielectric term is scaled so that
        # its derivative, (2 pi f)^2 x C / (4 pi^2 f), is C f.
        self._unit_bank = log_ratio * 2.0 / math.pi / self.corners
        self._poles = np.exp(-2.0 * math.pi * self.corners / self.fs)
        self._diff = _differentiator(self.fs)
        self._seed = np.random.SeedSequence(seed)

    def _bank_scales(self) -> dict[str, float]:
        """1/f coefficient of each bank: the flicker term itself, and the dielectric term before the derivative."""
        a, _, c, _ = self.coefficients
        return {"flicker": a, "dielectric": c / (4.0 * math.pi ** 2)}

    def chunks(self, n_samples: int, chunk_samples: int = 1 << 20) -> Iterator[np.ndarray]:
        """Yield ``n_samples`` samples (A) in chunks of at most ``chunk_samples``."""
        _, b, _, d = self.coefficients
        n_banks = len(self.corners)
        children = self._seed.spawn(2 + 2 * n_banks)
        rng_white = np.random.default_rng(children[0])
        rng_cap = np.random.default_rng(children[1])
        rng_bank = {"flicker": [np.random.default_rng(c) for c in children[2:2 + n_banks]],
                    "dielectric": [np.random.default_rng(c) for c in children[2 + n_banks:]]}
        bank_state = {name: np.zeros((n_banks, 1)) for name in rng_bank}
        diff_state = {"capacitive": np.zeros(len(self._diff) - 1), "dielectric": np.zeros(len(self._diff) - 1)}
        sigma_v = math.sqrt(d * self.fs / (8.0 * math.pi ** 2))  # white "voltage" fed to the derivative
        scales = self._bank_scales()
        done = 0
        while done < n_samples:
            n = min(chunk_samples, n_samples - done)
            out = np.full(n, self.mean_A)
            if b > 0:
                out += rng_white.standard_normal(n) * math.sqrt(b * self.fs / 2.0)
            if d > 0:
                y, diff_state["capacitive"] = signal.lfilter(self._diff, [1.0], rng_cap.standard_normal(n) * sigma_v,
                                                             zi=diff_state["capacitive"])
                out += y
            for name, scale in scales.items():
                if scale <= 0:
                    continue
                pink = np.zeros(n)
                for k, pole in enumerate(self._poles):
                    x = rng_bank[name][k].standard_normal(n) * math.sqrt(scale * self._unit_bank[k] * self.fs / 2.0)
                    y, bank_state[name][k] = signal.lfilter([1.0 - pole], [1.0, -pole], x, zi=bank_state[name][k])
                    pink += y
                if name == "dielectric":
                    pink, diff_state[name] = signal.lfilter(self._diff, [1.0], pink, zi=diff_state[name])
                out += pink
            done += n
            yield out

    def psd(self, freqs_hz: np.ndarray) -> np.ndarray:
        """Exact one-sided PSD (A^2/Hz) of the generated samples (what Welch converges to)."""
        f = np.asarray(freqs_hz, float)
        omega = 2.0 * math.pi * f / self.fs
        a, b, c, d = self.coefficients
        total = np.full(f.shape, b)
        if d > 0:
            _, h = signal.freqz(self._diff, worN=omega)
            total = total + (d * self.fs / (8.0 * math.pi ** 2)) * 2.0 / self.fs * np.abs(h) ** 2
        pink = np.zeros(f.shape)
        for w, pole in zip(self._unit_bank, self._poles, strict=True):
            pink = pink + w * np.abs((1.0 - pole) / (1.0 - pole * np.exp(-1j * omega))) ** 2
        scales = self._bank_scales()
        total = total + scales["flicker"] * pink
        if scales["dielectric"] > 0:
            _, h = signal.freqz(self._diff, worN=omega)
            total = total + scales["dielectric"] * pink * np.abs(h) ** 2
        return total
