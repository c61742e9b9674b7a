"""Parquet tables of the noise analysis, with units in the Arrow field metadata (key ``unit``).

An output folder holds::

    noise_fit.parquet         one row per recording: spectrum settings, what was left out for events,
                              model terms with standard errors, corner frequencies, equivalent
                              resistance, C_in or e_n*C_in
    noise_limits.parquet      one row per recording: detection limits at the cutoff, optimal cutoff
    noise_bandwidth.parquet   rms noise versus bandwidth (brick wall and Bessel; measured and model)
    noise_spectrum.parquet    the spectra: one row per recording and frequency bin
    noise_mains.parquet       mains lines found
    noise_compare.parquet     added capacitance against a reference recording (when one is given)

Each file is written under a hidden temporary name in the same folder and moved into place with
``os.replace``: a reader never sees half a file. The spectrum table is written one recording (one row
group) at a time, so memory holds one spectrum, whatever the number of files.
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..output import schema_for, table_from_rows, write_table_atomic
from ..stages import Column
from .model import TERMS
from .spectrum import band_rms, cumulative_rms

__all__ = ["TABLES", "NoiseTableWriter", "fit_row", "limits_row", "bandwidth_rows", "mains_rows", "compare_row"]

_F = "float64"

#: Column name, unit and doc of each model coefficient (in TERMS order).
COEFFICIENT_COLUMNS = {
    "flicker": ("flicker_coeff_A2", "A^2", "A of A/f (1/f noise)"),
    "white": ("white_psd_A2_per_Hz", "A^2/Hz", "B: white floor (4kT/R + 2qI)"),
    "dielectric": ("f_coeff_A2_per_Hz2", "A^2/Hz^2", "C of C f (dielectric loss)"),
    "capacitive": ("f2_coeff_A2_per_Hz3", "A^2/Hz^3", "D of D f^2 = (2 pi f C_in e_n)^2"),
}


def _with_stderr(name: str, unit: str, doc: str) -> dict[str, Column]:
    return {name: Column(_F, unit, doc), f"{name}_stderr": Column(_F, unit, f"standard error of {name}")}


FIT_COLUMNS: dict[str, Column] = {
    "file": Column("string", "", "recording"),
    "reader": Column("string", "", "reader plugin used (array for in-memory data)"),
    "sample_rate_Hz": Column(_F, "Hz", "sampling rate"),
    "duration_s": Column(_F, "s", "duration of the samples used"),
    "mean_current_A": Column(_F, "A", "mean current"),
    "window": Column("string", "", "Welch window"),
    "segment_samples": Column("int64", "", "Welch segment length"),
    "segment_s": Column(_F, "s", "Welch segment duration"),
    "overlap_samples": Column("int64", "", "overlap of consecutive segments"),
    "n_segments": Column("int64", "", "segments averaged"),
    "segments_total": Column("int64", "", "segments on the Welch grid, averaged or left out for holding an event"),
    "segments_excluded": Column("int64", "", "segments left out because they hold an event"),
    "segments_excluded_fraction": Column(_F, "", "segments_excluded / segments_total"),
    "time_used_fraction": Column(_F, "", "share of the recording inside averaged segments"),
    "segment_requested_samples": Column("int64", "", "Welch segment asked for (or the default) before any "
                                                    "shortening to keep enough segments free of events"),
    "events_mode": Column("string", "", "exclude: segments holding events left out; keep: all averaged"),
    "event_threshold_sigma": Column(_F, "", "excursion threshold, robust standard deviations (exclude mode)"),
    "event_noise_sigma_A": Column(_F, "A", "robust standard deviation of the samples, median over blocks "
                                          "(1.4826 MAD)"),
    "n_event_excursions": Column("int64", "", "excursions found (events, or events close together)"),
    "event_time_s": Column(_F, "s", "time inside excursions"),
    "event_time_fraction": Column(_F, "", "share of the recording inside excursions"),
    "effective_averages": Column(_F, "", "independent averages the overlapped estimate is worth"),
    "resolution_Hz": Column(_F, "Hz", "bin spacing"),
    "enbw_Hz": Column(_F, "Hz", "equivalent noise bandwidth of one bin"),
    "mains_Hz": Column(_F, "Hz", "mains frequency of the masked lines (0: none found)"),
    "n_mains_lines": Column("int64", "", "mains lines masked"),
    "mains_rms_A": Column(_F, "A", "rms current of all masked lines together"),
    "rms_total_A": Column(_F, "A", "rms noise from the first bin to Nyquist, mains masked"),
    "fit_f_lo_Hz": Column(_F, "Hz", "lowest fitted frequency"),
    "fit_f_hi_Hz": Column(_F, "Hz", "highest fitted frequency"),
    "fit_points": Column("int64", "", "log-frequency points fitted"),
    "fit_bins": Column("int64", "", "spectrum bins behind them"),
    "reduced_chi2": Column(_F, "", "generalised chi-square per degree of freedom (about 1 for a good fit)"),
    "terms_fitted": Column("string", "", "model terms fitted"),
    "terms_at_zero": Column("string", "", "terms fitted at zero (non-negativity bound)"),
    "temperature_K": Column(_F, "K", "temperature for resistance and loss"),
    **{k: v for t in TERMS for k, v in _with_stderr(*COEFFICIENT_COLUMNS[t[0]]).items()},
    **_with_stderr("corner_flicker_white_Hz", "Hz", "1/f corner A/B"),
    **_with_stderr("corner_white_dielectric_Hz", "Hz", "B/C"),
    **_with_stderr("corner_white_capacitive_Hz", "Hz", "sqrt(B/D): above it C_in e_n dominates"),
    **_with_stderr("corner_dielectric_capacitive_Hz", "Hz", "C/D"),
    **_with_stderr("equivalent_resistance_ohm", "ohm", "4kT/B (lower bound on feedback/seal resistance)"),
    **_with_stderr("dielectric_loss_product_F", "F", "D_d C_d = C / (8 pi k T)"),
    **_with_stderr("en_cin_product_F_V_per_sqrtHz", "F V/Hz^0.5", "e_n C_in = sqrt(D) / (2 pi)"),
    "voltage_noise_V_per_sqrtHz": Column(_F, "V/Hz^0.5", "amplifier voltage noise e_n given"),
    **_with_stderr("input_capacitance_F", "F", "C_in = sqrt(D) / (2 pi e_n) (when e_n is given)"),
}

LIMIT_COLUMNS: dict[str, Column] = {
    "file": Column("string", "", "recording"),
    "cutoff_Hz": Column(_F, "Hz", "Bessel -3 dB frequency"),
    "bessel_order": Column("int64", "", "Bessel poles"),
    "k_sigma": Column(_F, "", "threshold in noise standard deviations"),
    "noise_f_lo_Hz": Column(_F, "Hz", "lowest frequency in the noise integral"),
    "noise_f_hi_Hz": Column(_F, "Hz", "highest frequency in the noise integral (Nyquist)"),
    "noise_rms_A": Column(_F, "A", "expected rms noise after the filter (fitted model)"),
    "noise_rms_measured_A": Column(_F, "A", "rms of the measured spectrum after the filter"),
    "rise_time_s": Column(_F, "s", "10-90 % rise time of the filter"),
    "min_full_amplitude_duration_s": Column(_F, "s", "shortest event keeping its amplitude (2 rise times)"),
    "peak_kept_at_min_duration": Column(_F, "", "height fraction a pulse of that duration keeps"),
    "min_peak_A": Column(_F, "A", "smallest detectable peak, k sigma"),
    "event_duration_s": Column(_F, "s", "event duration of the charge limit"),
    "min_charge_C": Column(_F, "C", "smallest detectable charge of an event of event_duration_s"),
    "min_charge_impulse_C": Column(_F, "C", "smallest detectable charge of a very short event"),
    "material": Column("string", "", "particle material"),
    "min_diameter_m": Column(_F, "m", "equivalent diameter of min_charge_C"),
    "min_diameter_impulse_m": Column(_F, "m", "equivalent diameter of min_charge_impulse_C"),
    "target_duration_s": Column(_F, "s", "event duration the optimal cutoff is for"),
    "optimal_cutoff_Hz": Column(_F, "Hz", "cutoff maximising kept peak / rms noise"),
    "optimal_peak_fraction": Column(_F, "", "height fraction kept at the optimal cutoff"),
    "optimal_noise_rms_A": Column(_F, "A", "rms noise at the optimal cutoff"),
    "optimal_min_peak_A": Column(_F, "A", "smallest detectable event height at the optimal cutoff"),
    "optimal_at_nyquist": Column("bool", "", "optimum at the highest cutoff searched"),
}

BANDWIDTH_COLUMNS: dict[str, Column] = {
    "file": Column("string", "", "recording"),
    "bandwidth_Hz": Column(_F, "Hz", "brick-wall bandwidth or Bessel cutoff"),
    "bessel_order": Column("int64", "", "Bessel poles"),
    "rms_brickwall_measured_A": Column(_F, "A", "measured spectrum integrated up to the bandwidth"),
    "rms_brickwall_model_A": Column(_F, "A", "fitted model integrated up to the bandwidth"),
    "rms_bessel_measured_A": Column(_F, "A", "measured spectrum through the Bessel filter"),
    "rms_bessel_model_A": Column(_F, "A", "fitted model through the Bessel filter"),
}

SPECTRUM_COLUMNS: dict[str, Column] = {
    "file": Column("string", "", "recording"),
    "frequency_Hz": Column(_F, "Hz", "bin frequency"),
    "psd_A2_per_Hz": Column(_F, "A^2/Hz", "one-sided PSD (Welch)"),
    "mains_masked": Column("bool", "", "bin under a mains line"),
    "floor_psd_A2_per_Hz": Column(_F, "A^2/Hz", "local floor (running median)"),
    "model_psd_A2_per_Hz": Column(_F, "A^2/Hz", "fitted model"),
    "cumulative_rms_A": Column(_F, "A", "rms from 0 Hz to the bin's upper edge, mains masked"),
}

MAINS_COLUMNS: dict[str, Column] = {
    "file": Column("string", "", "recording"),
    "harmonic": Column("int64", "", "multiple of the mains frequency"),
    "frequency_Hz": Column(_F, "Hz", "line frequency"),
    "excess_psd_A2_per_Hz": Column(_F, "A^2/Hz", "peak PSD above the floor"),
    "line_rms_A": Column(_F, "A", "rms current of the line"),
    "significance": Column(_F, "", "peak over floor"),
}

COMPARE_COLUMNS: dict[str, Column] = {
    "file": Column("string", "", "cell recording"),
    "reference_file": Column("string", "", "reference recording (e.g. open circuit)"),
    **_with_stderr("added_en_c_product_F_V_per_sqrtHz", "F V/Hz^0.5", "e_n (C_cell - C_reference)"),
    **_with_stderr("added_capacitance_F", "F", "C_cell - C_reference"),
    "electrode_area_m2": Column(_F, "m^2", "electrode area"),
    **_with_stderr("capacitance_per_area_F_per_m2", "F/m^2", "added capacitance per area (1 F/m^2 = 100 uF/cm^2)"),
    "within_typical_double_layer": Column("bool", "", "within 10-40 uF/cm^2 (Bard & Faulkner)"),
    "plausible_double_layer": Column("bool", "", "within 5-100 uF/cm^2"),
    "warning": Column("string", "", "why the value is suspicious"),
}

TABLES: dict[str, dict[str, Column]] = {
    "noise_fit.parquet": FIT_COLUMNS,
    "noise_limits.parquet": LIMIT_COLUMNS,
    "noise_bandwidth.parquet": BANDWIDTH_COLUMNS,
    "noise_spectrum.parquet": SPECTRUM_COLUMNS,
    "noise_mains.parquet": MAINS_COLUMNS,
    "noise_compare.parquet": COMPARE_COLUMNS,
}


def _nan_to_none(value: Any) -> Any:
    return None if isinstance(value, float) and math.isnan(value) else value


def fit_row(analysis: Any) -> dict[str, Any]:
    """Row of ``noise_fit.parquet`` for a :class:`impactline.noise.NoiseAnalysis`."""
    spec, fit = analysis.spectrum, analysis.fit
    row: dict[str, Any] = {
        "file": analysis.name, "reader": analysis.reader, "sample_rate_Hz": spec.sample_rate_hz,
        "duration_s": spec.duration_s, "mean_current_A": spec.mean_A, "window": str(spec.window),
        "segment_samples": spec.nperseg, "segment_s": spec.segment_s, "overlap_samples": spec.noverlap,
        "n_segments": spec.n_segments, "effective_averages": spec.effective_averages,
        **_event_fields(analysis),
        "resolution_Hz": spec.resolution_hz, "enbw_Hz": spec.enbw_hz, "mains_Hz": spec.mains_hz,
        "n_mains_lines": len(spec.mains_peaks),
        "mains_rms_A": math.sqrt(sum(p.line_rms_A ** 2 for p in spec.mains_peaks)),
        "rms_total_A": band_rms(spec, analysis.f_low_hz), "fit_f_lo_Hz": fit.f_lo_hz, "fit_f_hi_Hz": fit.f_hi_hz,
        "fit_points": fit.n_points, "fit_bins": fit.n_bins, "reduced_chi2": fit.reduced_chi2,
        "terms_fitted": ",".join(fit.terms),
        "terms_at_zero": ",".join(t[0] for t, z in zip(TERMS, fit.at_zero, strict=True) if z and t[0] in fit.terms),
        "temperature_K": fit.temperature_k,
    }
    for j, (term, _, _) in enumerate(TERMS):
        name = COEFFICIENT_COLUMNS[term][0]
        row[name] = float(fit.coefficients[j])
        row[f"{name}_stderr"] = float(fit.stderr[j])
    for key, (value, error) in fit.corner_frequencies().items():
        row[f"corner_{key}_Hz"], row[f"corner_{key}_Hz_stderr"] = value, error
    pairs = {"equivalent_resistance_ohm": fit.equivalent_resistance(),
             "dielectric_loss_product_F": fit.dielectric_loss_product(),
             "en_cin_product_F_V_per_sqrtHz": fit.voltage_capacitance_product(),
             "input_capacitance_F": analysis.input_capacitance}
    for name, (value, error) in pairs.items():
        row[name], row[f"{name}_stderr"] = value, error
    row["voltage_noise_V_per_sqrtHz"] = analysis.voltage_noise
    return {k: _nan_to_none(v) for k, v in row.items()}


def _event_fields(analysis: Any) -> dict[str, Any]:
    """The fit-table columns on segments and events left out (None where keep mode measured nothing)."""
    spec, ev = analysis.spectrum, getattr(analysis, "events", None)
    row: dict[str, Any] = {
        "segments_total": spec.n_segments_total, "segments_excluded": spec.n_segments_excluded,
        "segments_excluded_fraction": spec.n_segments_excluded / spec.n_segments_total,
        "time_used_fraction": spec.used_samples / spec.n_samples,
        "segment_requested_samples": ev.segment_requested if ev is not None else spec.nperseg,
        "events_mode": ev.mode if ev is not None else "keep",
    }
    if ev is not None and ev.mode == "exclude":
        row.update({"event_threshold_sigma": ev.threshold_sigma, "event_noise_sigma_A": ev.sigma_A,
                    "n_event_excursions": ev.n_excursions, "event_time_s": ev.event_time_s,
                    "event_time_fraction": ev.event_fraction})
    return row


def limits_row(analysis: Any) -> dict[str, Any]:
    """Row of ``noise_limits.parquet``."""
    lim = analysis.limits
    row = {
        "file": analysis.name, "cutoff_Hz": lim.cutoff_hz, "bessel_order": lim.order, "k_sigma": lim.k_sigma,
        "noise_f_lo_Hz": analysis.f_low_hz, "noise_f_hi_Hz": analysis.nyquist_hz,
        "noise_rms_A": lim.noise_rms_A, "noise_rms_measured_A": lim.noise_rms_measured_A,
        "rise_time_s": lim.rise_time_s, "min_full_amplitude_duration_s": lim.min_full_amplitude_duration_s,
        "peak_kept_at_min_duration": lim.peak_kept_at_min_duration, "min_peak_A": lim.min_peak_A,
        "event_duration_s": lim.event_duration_s, "min_charge_C": lim.min_charge_C,
        "min_charge_impulse_C": lim.min_charge_impulse_C, "material": lim.material,
        "min_diameter_m": lim.min_diameter_m, "min_diameter_impulse_m": lim.min_diameter_impulse_m,
    }
    if lim.optimal is not None:
        row.update({
            "target_duration_s": lim.event_duration_s, "optimal_cutoff_Hz": lim.optimal.cutoff_hz,
            "optimal_peak_fraction": lim.optimal.peak_fraction, "optimal_noise_rms_A": lim.optimal.noise_rms_A,
            "optimal_min_peak_A": lim.optimal.min_peak_A, "optimal_at_nyquist": lim.optimal.at_bound,
        })
    return {k: _nan_to_none(v) for k, v in row.items()}


def bandwidth_rows(analysis: Any) -> list[dict[str, Any]]:
    """Rows of ``noise_bandwidth.parquet``."""
    return [{"file": analysis.name, "bandwidth_Hz": r.bandwidth_hz, "bessel_order": analysis.bessel_order,
             "rms_brickwall_measured_A": r.brickwall_measured_A, "rms_brickwall_model_A": r.brickwall_model_A,
             "rms_bessel_measured_A": r.bessel_measured_A, "rms_bessel_model_A": r.bessel_model_A}
            for r in analysis.bandwidth]


def mains_rows(analysis: Any) -> list[dict[str, Any]]:
    """Rows of ``noise_mains.parquet``."""
    return [{"file": analysis.name, "harmonic": p.harmonic, "frequency_Hz": p.frequency_hz,
             "excess_psd_A2_per_Hz": p.excess_psd_A2_per_Hz, "line_rms_A": p.line_rms_A,
             "significance": p.significance} for p in analysis.spectrum.mains_peaks]


def compare_row(comparison: Any) -> dict[str, Any]:
    """Row of ``noise_compare.parquet`` for a :class:`impactline.noise.CapacitanceComparison`."""
    c = comparison
    row = {
        "file": c.cell, "reference_file": c.reference,
        "added_en_c_product_F_V_per_sqrtHz": c.added_product,
        "added_en_c_product_F_V_per_sqrtHz_stderr": c.added_product_stderr,
        "added_capacitance_F": c.added_capacitance_F, "added_capacitance_F_stderr": c.added_capacitance_stderr_F,
        "electrode_area_m2": c.area_m2, "capacitance_per_area_F_per_m2": c.capacitance_per_area_F_per_m2,
        "capacitance_per_area_F_per_m2_stderr": c.capacitance_per_area_stderr_F_per_m2,
        "within_typical_double_layer": c.within_typical, "plausible_double_layer": c.plausible,
        "warning": c.warning,
    }
    return {k: _nan_to_none(v) for k, v in row.items()}


def spectrum_table(analysis: Any) -> pa.Table:
    """The spectrum of one recording as a table (one row per bin)."""
    spec = analysis.spectrum
    freqs = spec.freqs_hz
    with np.errstate(divide="ignore", invalid="ignore"):
        model = np.where(freqs > 0, analysis.fit.psd(np.where(freqs > 0, freqs, 1.0)), np.nan)
    floor = spec.floor if spec.floor is not None else np.full(freqs.shape, np.nan)
    schema = schema_for(SPECTRUM_COLUMNS)
    arrays = [pa.array(np.full(len(freqs), analysis.name, dtype=object), pa.string()), pa.array(freqs),
              pa.array(spec.psd), pa.array(spec.mask), pa.array(floor), pa.array(model, from_pandas=True),
              pa.array(cumulative_rms(spec))]
    return pa.Table.from_arrays(arrays, schema=schema)


class NoiseTableWriter:
    """Writes the noise tables of a run into ``out_dir``, atomically.

    Parameters
    ----------
    out_dir : path
        Output folder (created).
    overwrite : bool
        Replace existing tables; otherwise refuse when any exists.
    metadata : mapping, optional
        Key-value pairs stored in every file's schema metadata (e.g. the command line).

    Use :meth:`add` for each analysis, :meth:`add_comparison` for comparisons, then :meth:`close`;
    on an exception, :meth:`abort` removes the temporary files.
    """

    def __init__(self, out_dir: str | Path, *, overwrite: bool = False, metadata: Mapping[str, str] | None = None):
        self.out_dir = Path(out_dir)
        existing = [name for name in TABLES if (self.out_dir / name).exists()]
        if existing and not overwrite:
            raise FileExistsError(
                f"{self.out_dir} already holds {', '.join(existing)}; choose another --out or pass --overwrite"
            )
        self.out_dir.mkdir(parents=True, exist_ok=True)
        self.metadata = dict(metadata or {})
        self.rows: dict[str, list[dict[str, Any]]] = {name: [] for name in TABLES if name != "noise_spectrum.parquet"}
        self._spectrum_tmp = self.out_dir / f".noise_spectrum.parquet.{os.getpid()}.tmp"
        self._spectrum_writer: pq.ParquetWriter | None = None
        self.written: list[Path] = []

    def add(self, analysis: Any) -> None:
        """Add one recording's rows (the spectrum goes straight to disk as a row group)."""
        self.rows["noise_fit.parquet"].append(fit_row(analysis))
        self.rows["noise_limits.parquet"].append(limits_row(analysis))
        self.rows["noise_bandwidth.parquet"].extend(bandwidth_rows(analysis))
        self.rows["noise_mains.parquet"].extend(mains_rows(analysis))
        table = spectrum_table(analysis)
        if self._spectrum_writer is None:
            schema = table.schema.with_metadata(self.metadata)
            self._spectrum_writer = pq.ParquetWriter(self._spectrum_tmp, schema, compression="zstd")
        self._spectrum_writer.write_table(table.replace_schema_metadata(self.metadata))

    def add_comparison(self, comparison: Any) -> None:
        """Add a capacitance comparison row."""
        self.rows["noise_compare.parquet"].append(compare_row(comparison))

    def close(self) -> list[Path]:
        """Move every table into place (empty ones too, so no stale table survives); return the paths."""
        if self._spectrum_writer is not None:
            self._spectrum_writer.close()
            self._spectrum_writer = None
            target = self.out_dir / "noise_spectrum.parquet"
            os.replace(self._spectrum_tmp, target)
            self.written.append(target)
        for name, rows in self.rows.items():
            table = table_from_rows(rows, schema_for(TABLES[name], self.metadata))
            write_table_atomic(table, self.out_dir / name)
            self.written.append(self.out_dir / name)
        return self.written

    def abort(self) -> None:
        """Drop the partial spectrum file."""
        if self._spectrum_writer is not None:
            self._spectrum_writer.close()
            self._spectrum_writer = None
        if self._spectrum_tmp.exists():
            self._spectrum_tmp.unlink()
