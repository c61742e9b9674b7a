"""The input-referred current-noise model of a transimpedance amplifier, and its fit to a Welch spectrum.

Model (Levis & Rae 1993, Biophys. J. 65:1666-1677; measured spectra of fast current amplifiers are fitted
in the same four-term form, e.g. Rosenstein et al. 2012, Nature Methods 9:487)::

    S(f) = A / f + B + C f + D f^2                                              [A^2/Hz]

    B = 4 k T / R + 2 q I        white floor: thermal noise of the feedback/seal resistance, shot noise
    A                            1/f (flicker) noise
    C = 8 pi k T D_d C_d          dielectric loss of a material with loss factor D_d and capacitance C_d
    D = (2 pi C_in e_n)^2         amplifier voltage noise e_n across the total input capacitance C_in

Fit
---
A Welch bin is ``S * chi2(nu) / nu`` (nu = 2 K_eff): its scatter is proportional to the value itself, and
neighbouring bins are correlated through the window. The fit is generalised least squares with that
covariance, ``Cov(P_k, P_l) = S_k S_l rho(|k - l|) / K_eff``, evaluated at the current model and
iterated (iteratively reweighted least squares for a variance ~ mean^2, i.e. the quasi-likelihood of a
Gamma model; McCullagh & Nelder 1989, Generalized Linear Models, ch. 8), with non-negative coefficients
(non-negative least squares solved exactly over the few possible active sets). Weights come from the
model, not from the noisy data, so the estimate is not biased low. Bins are first averaged in
logarithmic frequency bands (the basis functions averaged over the same bins, so the model stays exact);
mains bins are left out.

Covariance of the coefficients: ``(X^T Sigma^-1 X)^-1`` over the coefficients away from zero, scaled by
the reduced chi-square when it exceeds 1 by more than three times its chance scatter (the model misses
something, e.g. a resonance or an anti-alias roll-off inside the fitted band). A coefficient fitted at zero gets
the standard error of the full unconstrained problem, a scale for how large it could be.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import constants, linalg

from .spectrum import Spectrum, bin_correlation

__all__ = [
    "TERMS",
    "NoiseFit",
    "fit_noise_model",
    "model_psd",
    "johnson_current_psd",
    "shot_noise_psd",
    "capacitive_rms_brickwall",
    "parse_voltage_noise",
]

#: Model terms in coefficient order: (name, power of f, unit of the coefficient).
TERMS: tuple[tuple[str, int, str], ...] = (
    ("flicker", -1, "A^2"),
    ("white", 0, "A^2/Hz"),
    ("dielectric", 1, "A^2/Hz^2"),
    ("capacitive", 2, "A^2/Hz^3"),
)
TERM_NAMES = tuple(t[0] for t in TERMS)
_POWERS = np.array([t[1] for t in TERMS])

K_B = constants.k  # J/K, exact in the 2019 SI
Q_E = constants.e  # C, exact in the 2019 SI


def johnson_current_psd(resistance_ohm: float, temperature_k: float = 298.15) -> float:
    """One-sided Johnson-Nyquist current-noise PSD of a resistor, ``4 k T / R`` (A^2/Hz).

    Johnson (1928), Phys. Rev. 32:97; Nyquist (1928), Phys. Rev. 32:110.
    """
    return 4.0 * K_B * temperature_k / resistance_ohm


def shot_noise_psd(current_a: float) -> float:
    """One-sided shot-noise PSD of a DC current, ``2 q |I|`` (A^2/Hz). Schottky (1918)."""
    return 2.0 * Q_E * abs(current_a)


def capacitive_rms_brickwall(voltage_noise: float, capacitance_f: float, bandwidth_hz: float) -> float:
    """rms current of the ``(2 pi f C e_n)^2`` term integrated from 0 to ``bandwidth_hz`` (A).

    ``i^2 = (4 pi^2 / 3) e_n^2 C^2 B^3`` (the "B^3 law"; Levis & Rae 1993).
    """
    return math.sqrt(4.0 * math.pi ** 2 / 3.0 * voltage_noise ** 2 * capacitance_f ** 2 * bandwidth_hz ** 3)


def parse_voltage_noise(value: str | float) -> float:
    """Read an amplifier voltage-noise density (V/sqrt(Hz)): ``"5 nV"``, ``"5 nV/sqrt(Hz)"``, ``5e-9``."""
    from ..units import parse_quantity

    if isinstance(value, str):
        text = value.strip()
        for suffix in ("/sqrt(Hz)", "/sqrtHz", "/rtHz", "/√Hz", "/Hz^0.5", "/Hz^1/2"):
            if text.endswith(suffix):
                text = text[: -len(suffix)]
                break
        value = text
    number = parse_quantity(value, "V")
    if not number > 0:
        raise ValueError(f"voltage noise must be > 0 V/sqrt(Hz), got {value!r}")
    return number


def model_psd(freqs_hz: np.ndarray, coefficients: np.ndarray) -> np.ndarray:
    """Evaluate ``A/f + B + C f + D f^2`` (A^2/Hz) at ``freqs_hz`` (Hz, > 0)."""
    f = np.asarray(freqs_hz, float)
    a, b, c, d = coefficients
    return a / f + b + c * f + d * f * f


@dataclass
class NoiseFit:
    """Result of :func:`fit_noise_model`.

    Attributes
    ----------
    coefficients : ndarray, shape (4,)
        ``A`` (A^2), ``B`` (A^2/Hz), ``C`` (A^2/Hz^2), ``D`` (A^2/Hz^3).
    covariance : ndarray, shape (4, 4)
        Covariance of the coefficients (zero rows/columns for terms left out or at zero).
    stderr : ndarray, shape (4,)
        Standard errors (see module notes for terms at zero).
    at_zero : ndarray of bool
        Terms whose fitted value is zero (the non-negativity bound is active or the term was left out).
    terms : tuple of str
        Terms that were fitted.
    f_lo_hz, f_hi_hz : float
        Fitted band, Hz.
    n_points : int
        Number of (log-binned) spectrum points fitted.
    n_bins : int
        Number of raw spectrum bins behind them.
    reduced_chi2 : float
        Generalised chi-square per degree of freedom (about 1 when the model describes the spectrum).
    iterations : int
        Reweighting iterations used.
    temperature_k : float
        Temperature used to turn coefficients into resistance and loss, K.
    """

    coefficients: np.ndarray
    covariance: np.ndarray
    stderr: np.ndarray
    at_zero: np.ndarray
    terms: tuple[str, ...]
    f_lo_hz: float
    f_hi_hz: float
    n_points: int
    n_bins: int
    reduced_chi2: float
    iterations: int
    temperature_k: float
    points_hz: np.ndarray = field(repr=False, default=None)  # type: ignore[assignment]
    points_psd: np.ndarray = field(repr=False, default=None)  # type: ignore[assignment]

    # ------------------------------------------------------------------ terms
    @property
    def flicker(self) -> float:
        """``A``, A^2 (1/f coefficient)."""
        return float(self.coefficients[0])

    @property
    def white(self) -> float:
        """``B``, A^2/Hz."""
        return float(self.coefficients[1])

    @property
    def dielectric(self) -> float:
        """``C``, A^2/Hz^2."""
        return float(self.coefficients[2])

    @property
    def capacitive(self) -> float:
        """``D``, A^2/Hz^3."""
        return float(self.coefficients[3])

    def psd(self, freqs_hz: np.ndarray) -> np.ndarray:
        """Model PSD at ``freqs_hz``, A^2/Hz."""
        return model_psd(freqs_hz, self.coefficients)

    # ------------------------------------------------------------------ derived quantities
    def _ratio(self, i: int, j: int, power: float = 1.0) -> tuple[float, float]:
        """(c_i / c_j)^power and its standard error by the delta method; NaN when a term is zero."""
        ci, cj = self.coefficients[i], self.coefficients[j]
        if ci <= 0 or cj <= 0:
            return math.nan, math.nan
        value = (ci / cj) ** power
        grad = np.zeros(4)
        grad[i] = power / ci
        grad[j] = -power / cj
        rel_var = float(grad @ self.covariance @ grad)
        return float(value), float(value * math.sqrt(max(rel_var, 0.0)))

    def corner_frequencies(self) -> dict[str, tuple[float, float]]:
        """Where neighbouring terms cross, Hz, each as (value, standard error).

        ``flicker_white``: A / B (1/f corner); ``white_dielectric``: B / C; ``white_capacitive``:
        sqrt(B / D) (above it the input capacitance dominates); ``dielectric_capacitive``: C / D.
        """
        return {
            "flicker_white": self._ratio(0, 1),
            "white_dielectric": self._ratio(1, 2),
            "white_capacitive": self._ratio(1, 3, 0.5),
            "dielectric_capacitive": self._ratio(2, 3),
        }

    def equivalent_resistance(self) -> tuple[float, float]:
        """Resistance whose Johnson noise equals the white floor, ``4 k T / B`` (ohm), with standard error.

        The floor also holds any shot noise, so this is a lower bound on the feedback/seal resistance.
        """
        b, sb = self.white, self.stderr[1]
        if b <= 0:
            return math.inf, math.nan
        r = 4.0 * K_B * self.temperature_k / b
        return r, r * sb / b

    def voltage_capacitance_product(self) -> tuple[float, float]:
        """``e_n * C_in = sqrt(D) / (2 pi)`` (V F / sqrt(Hz)) with standard error (when e_n is unknown)."""
        d, sd = self.capacitive, self.stderr[3]
        if d <= 0:
            return 0.0, math.sqrt(sd) / (2.0 * math.pi)
        value = math.sqrt(d) / (2.0 * math.pi)
        return value, value * 0.5 * sd / d

    def input_capacitance(self, voltage_noise: float) -> tuple[float, float]:
        """Input capacitance ``C_in = sqrt(D) / (2 pi e_n)`` (F) with standard error.

        Parameters
        ----------
        voltage_noise : float
            Amplifier input voltage-noise density ``e_n``, V/sqrt(Hz).
        """
        product, error = self.voltage_capacitance_product()
        return product / voltage_noise, error / voltage_noise

    def dielectric_loss_product(self) -> tuple[float, float]:
        """``D_d * C_d = C / (8 pi k T)`` (F): loss factor times capacitance of the lossy dielectric."""
        scale = 8.0 * math.pi * K_B * self.temperature_k
        return self.dielectric / scale, float(self.stderr[2]) / scale


def _log_bins(freqs: np.ndarray, points_per_decade: int) -> np.ndarray:
    """Label each frequency with a logarithmic band; consecutive labels, empty bands dropped."""
    edges_log = np.floor(np.log10(freqs) * points_per_decade)
    _, labels = np.unique(edges_log, return_inverse=True)
    return labels


def _binned_design(freqs: np.ndarray, labels: np.ndarray, n_points: int, use: np.ndarray) -> np.ndarray:
    """Basis functions f^p averaged over the raw bins of each band (so averaging keeps the model exact)."""
    counts = np.bincount(labels, minlength=n_points).astype(float)
    design = np.zeros((n_points, 4))
    for j, power in enumerate(_POWERS):
        if use[j]:
            design[:, j] = np.bincount(labels, weights=freqs ** float(power), minlength=n_points) / counts
    return design


def _binned_covariance(model_raw: np.ndarray, labels: np.ndarray, index: np.ndarray, n_points: int,
                       rho: np.ndarray, k_eff: float) -> np.ndarray:
    """Covariance of the band means: sum over raw-bin pairs of S_i S_j rho(|i - j|) / K_eff / (M_a M_b)."""
    counts = np.bincount(labels, minlength=n_points).astype(float)
    size = n_points * n_points
    cov = np.bincount(labels * (n_points + 1), weights=model_raw ** 2, minlength=size)
    # index holds the raw-bin numbers of the kept bins; kept bins `lag` apart in raw number are correlated.
    for lag in range(1, len(rho)):
        target = index + lag
        j = np.searchsorted(index, target)
        ok = (j < len(index)) & (index[np.minimum(j, len(index) - 1)] == target)
        a, b = np.nonzero(ok)[0], j[ok]
        values = rho[lag] * model_raw[a] * model_raw[b]
        cov += np.bincount(labels[a] * n_points + labels[b], weights=values, minlength=size)
        cov += np.bincount(labels[b] * n_points + labels[a], weights=values, minlength=size)
    return cov.reshape(n_points, n_points) / np.outer(counts, counts) / k_eff


def fit_noise_model(spec: Spectrum, *, f_lo_hz: float | None = None, f_hi_hz: float | None = None,
                    terms: tuple[str, ...] = TERM_NAMES, points_per_decade: int = 40,
                    temperature_k: float = 298.15, max_iter: int = 50, rtol: float = 1e-9) -> NoiseFit:
    """Fit ``A/f + B + C f + D f^2`` (non-negative) to a Welch spectrum.

    Parameters
    ----------
    spec : Spectrum
        The spectrum; bins in ``spec.mask`` (mains lines) are left out.
    f_lo_hz : float, optional
        Lowest frequency fitted, Hz. Default: 5 bins (the lowest bins carry the detrending and the
        window's leakage from DC).
    f_hi_hz : float, optional
        Highest frequency fitted, Hz. Default: 0.4 x the sampling rate. It must stay below the corner of
        any anti-alias filter applied while recording, which bends the spectrum down.
    terms : tuple of str
        Terms to fit, among ``"flicker", "white", "dielectric", "capacitive"``.
    points_per_decade : int
        Logarithmic bands per decade the raw bins are averaged into.
    temperature_k : float
        Temperature for the derived resistance and dielectric loss, K.
    max_iter : int
        Maximum reweighting iterations.
    rtol : float
        Convergence: largest relative change of the model over the fitted points.

    Returns
    -------
    NoiseFit

    Raises
    ------
    ValueError
        For an empty band, unknown terms, or fewer points than terms.
    """
    unknown = [t for t in terms if t not in TERM_NAMES]
    if unknown or not terms:
        raise ValueError(f"terms must be a non-empty subset of {', '.join(TERM_NAMES)}; got {terms!r}")
    use = np.array([name in terms for name in TERM_NAMES])
    df = spec.resolution_hz
    f_lo = 5.0 * df if f_lo_hz is None else float(f_lo_hz)
    f_hi = 0.4 * spec.sample_rate_hz if f_hi_hz is None else float(f_hi_hz)
    f_hi = min(f_hi, spec.sample_rate_hz / 2.0 - df)  # the Nyquist bin is real-valued (chi2 with 1 dof)
    freqs = spec.freqs_hz
    keep = (freqs >= max(f_lo, df)) & (freqs <= f_hi) & ~spec.mask
    index = np.nonzero(keep)[0]
    if len(index) < use.sum() + 1:
        raise ValueError(
            f"only {len(index)} spectrum bins between {f_lo:g} and {f_hi:g} Hz (resolution {df:g} Hz); "
            "widen the fit band or use longer segments"
        )
    f_raw, p_raw = freqs[index], spec.psd[index]
    labels = _log_bins(f_raw, points_per_decade)
    n_points = int(labels.max()) + 1
    counts = np.bincount(labels, minlength=n_points).astype(float)
    y = np.bincount(labels, weights=p_raw, minlength=n_points) / counts
    design = _binned_design(f_raw, labels, n_points, use)
    f_points = np.bincount(labels, weights=f_raw, minlength=n_points) / counts
    if n_points <= use.sum():
        raise ValueError(f"{n_points} fit points for {int(use.sum())} terms; widen the fit band")
    rho = bin_correlation(spec.window_values)
    k_eff = spec.effective_averages
    raw_design = np.stack([f_raw ** float(p) if u else np.zeros_like(f_raw)
                           for p, u in zip(_POWERS, use, strict=True)], axis=1)
    floor = np.finfo(float).tiny
    model_raw = np.maximum(spec.floor[index] if spec.floor is not None else p_raw, floor)
    coef = np.zeros(4)
    iterations = 0
    previous = None
    while iterations < max_iter:
        iterations += 1
        gls = _Gls(_binned_covariance(model_raw, labels, index, n_points, rho, k_eff), len(rho) - 1, design, y)
        coef = _nnls_normal(gls.normal, gls.rhs, use)
        fitted = design @ coef
        if previous is not None and np.max(np.abs(fitted - previous) / np.maximum(np.abs(previous), floor)) < rtol:
            break
        previous = fitted
        # Next weights from the model; a model that is zero somewhere (all terms at zero) falls back on data.
        model_raw = raw_design @ coef
        model_raw = np.where(model_raw > 0, model_raw, np.maximum(p_raw, floor))
    # Final covariance at the converged model.
    model_raw = np.maximum(raw_design @ coef, floor)
    gls = _Gls(_binned_covariance(model_raw, labels, index, n_points, rho, k_eff), len(rho) - 1, design, y)
    free = use & (coef > 0)
    dof = max(n_points - int(free.sum()), 1)
    reduced = gls.chi2(y - design @ coef) / dof
    # Scale the covariance by the reduced chi-square only when the misfit is significant (beyond 3 sd of
    # its chance scatter, sqrt(2 / dof)): then the model misses structure and the errors must grow.
    inflate = reduced if reduced > 1.0 + 3.0 * math.sqrt(2.0 / dof) else 1.0
    covariance = np.zeros((4, 4))
    if free.any():
        fi = np.nonzero(free)[0]
        covariance[np.ix_(fi, fi)] = _scaled_inverse(gls.normal[np.ix_(fi, fi)]) * inflate
    stderr = np.sqrt(np.clip(np.diag(covariance), 0.0, None))
    bound = use & ~free
    if bound.any():
        ui = np.nonzero(use)[0]
        full = _scaled_inverse(gls.normal[np.ix_(ui, ui)]) * inflate
        for pos, j in enumerate(ui):
            if bound[j]:
                stderr[j] = math.sqrt(max(full[pos, pos], 0.0))
    return NoiseFit(coefficients=coef, covariance=covariance, stderr=stderr, at_zero=~free, terms=tuple(terms),
                    f_lo_hz=float(f_raw[0]), f_hi_hz=float(f_raw[-1]), n_points=n_points, n_bins=len(index),
                    reduced_chi2=reduced, iterations=iterations, temperature_k=float(temperature_k),
                    points_hz=f_points, points_psd=y)


class _Gls:
    """Generalised least squares pieces for a banded covariance: ``X^T S^-1 X``, ``X^T S^-1 y``, chi-square.

    The covariance of the band means is banded (only bins a few raw bins apart correlate), so it is solved
    in band storage (``scipy.linalg.solveh_banded``): linear in the number of points, and free of the
    multi-threaded dense kernels that stall on a busy machine.
    """

    def __init__(self, cov: np.ndarray, bandwidth: int, design: np.ndarray, y: np.ndarray):
        n = cov.shape[0]
        bandwidth = max(0, min(bandwidth, n - 1))
        band = np.zeros((bandwidth + 1, n))
        for d in range(bandwidth + 1):  # upper form: band[bandwidth - d, j] = cov[j - d, j]
            band[bandwidth - d, d:] = np.diagonal(cov, offset=d)
        # Scale to order one: covariance entries are ~1e-58 A^4/Hz^2.
        self.scale = float(np.max(band[-1]))
        self.band = band / self.scale
        solved = linalg.solveh_banded(self.band, np.column_stack((design, y)), lower=False)
        self.normal = design.T @ solved[:, :-1] / self.scale
        self.rhs = design.T @ solved[:, -1] / self.scale

    def chi2(self, residual: np.ndarray) -> float:
        """``r^T S^-1 r``."""
        return float(residual @ linalg.solveh_banded(self.band, residual, lower=False)) / self.scale


def _nnls_normal(normal: np.ndarray, rhs: np.ndarray, use: np.ndarray) -> np.ndarray:
    """Minimise ``b^T G b - 2 h^T b`` subject to ``b >= 0`` (non-negative least squares, normal form).

    With at most four unknowns every active set is tried: the optimum is the solution of ``G_SS b_S = h_S``
    with ``b_S > 0`` that has the lowest objective (exact, as ``scipy.optimize.nnls`` would find).
    """
    cols = np.nonzero(use)[0]
    scale = np.sqrt(np.maximum(np.diag(normal)[cols], np.finfo(float).tiny))
    g = normal[np.ix_(cols, cols)] / np.outer(scale, scale)
    h = rhs[cols] / scale
    best, best_value = np.zeros(len(cols)), 0.0
    for subset in itertools.chain.from_iterable(itertools.combinations(range(len(cols)), k)
                                                for k in range(1, len(cols) + 1)):
        idx = list(subset)
        try:
            sol = np.linalg.solve(g[np.ix_(idx, idx)], h[idx])
        except np.linalg.LinAlgError:
            continue
        if np.any(sol <= 0):
            continue
        trial = np.zeros(len(cols))
        trial[idx] = sol
        value = float(trial @ g @ trial - 2.0 * h @ trial)
        if value < best_value:
            best, best_value = trial, value
    coef = np.zeros(4)
    coef[cols] = best / scale
    return coef


def _scaled_inverse(normal: np.ndarray) -> np.ndarray:
    """Inverse of a normal matrix whose entries span many decades (scaled to unit diagonal first)."""
    scale = np.sqrt(np.maximum(np.diag(normal), np.finfo(float).tiny))
    inv = np.linalg.pinv(normal / np.outer(scale, scale))
    return inv / np.outer(scale, scale)
