"""Event shapes across a whole run (or several): embedding, cluster summaries, and safe trained models.

The ``waveform`` measure stores each event's aligned, resampled waveform as the fixed-length
``shape`` column; this module turns shapes and scalar features into the matrices that the clustering
stages (``kmeans``, ``gmm``, ``density``) and the trained ``forest`` classifier work on, summarises
clusters, and reads and writes the tables that ``impactline cluster``, ``train`` and ``classify`` leave
in each run folder.

Why here and not in a plugin: the commands in :mod:`impactline.shapes_cli` need the embedding, the cluster
summaries and the model format, and the core imports no plugin; the bundled stages import this module.

Embedding (:func:`embed`)
    ``pca``: exact principal components of the shapes, accumulated over row batches (the covariance
    of 64 points is 64 x 64 however many events there are); ``wavelet``: the highest-variance
    coefficients of a 4-level Haar transform; ``features``: scalar columns, log10 of magnitudes for
    quantities in s, A, C or m, each standardized (by default only the continuous columns measured on
    nearly every event, :func:`screen_features`); ``pca+features``: both blocks side by side.
Sidecar tables (one row per event unless noted), joined on ``(file, event_id)``
    ``clusters.parquet`` (cluster labels), ``cluster_prototypes.parquet`` (one row per cluster: median
    shape and spread), ``cluster_sizes.parquet`` (one row per file and cluster),
    ``cluster_selection.parquet`` (one row per candidate cluster count: the criterion),
    ``classes.parquet`` (labels from a trained model). :func:`read_events_with` joins them.
Trained models (:class:`ForestModel`)
    A random forest saved as plain arrays in a ``.npz`` (loaded with ``allow_pickle=False``) plus a JSON
    header; prediction is re-implemented in numpy and matches scikit-learn's exactly. Nothing is pickled.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from .errors import ImpactlineError
from .output import EVENTS_DIR, join_sidecar, read_events, schema_for, write_table_atomic
from .stages import Column

__all__ = [
    "SHAPE_COLUMN", "DEFAULT_FEATURES", "EMBEDDINGS", "CLUSTERS_TABLE", "PROTOTYPES_TABLE", "SIZES_TABLE",
    "SELECTION_TABLE", "CLASSES_TABLE", "SIDECAR_TABLES", "load_run_events", "shape_matrix", "feature_matrix",
    "PCAFit", "pca_fit", "wavelet_features", "screen_features", "MAX_MISSING_SHARE",
    "asinh_transform", "SHAPE_TRANSFORMS", "Embedding", "embed", "prototypes", "cluster_sizes",
    "selection_table", "write_sidecar", "join_sidecar", "read_events_with", "read_label_file", "match_labels",
    "ForestModel", "model_inputs",
]

SHAPE_COLUMN = "shape"
#: Scalar columns used as features when present (log10 of the magnitude for those with a unit).
DEFAULT_FEATURES: tuple[str, ...] = ("duration_s", "peak_A", "charge_C", "rise_time_s", "fwhm_s", "decay_time_s",
                                     "subpeak_count")
EMBEDDINGS: tuple[str, ...] = ("pca+features", "pca", "wavelet", "features")
SHAPE_TRANSFORMS: tuple[str, ...] = ("asinh", "none")
#: Fraction of the shape variance the automatic number of components keeps, and its bounds.
AUTO_VARIANCE = 0.95
AUTO_COMPONENTS = (2, 16)
#: Largest share of events a default scalar feature may lack and still enter a clustering embedding.
MAX_MISSING_SHARE = 0.05
WAVELET, WAVELET_LEVELS = "haar", 4

CLUSTERS_TABLE = "clusters.parquet"
PROTOTYPES_TABLE = "cluster_prototypes.parquet"
SIZES_TABLE = "cluster_sizes.parquet"
SELECTION_TABLE = "cluster_selection.parquet"
CLASSES_TABLE = "classes.parquet"
#: Per-event sidecars that :func:`read_events_with` joins, in order.
SIDECAR_TABLES: tuple[str, ...] = (CLUSTERS_TABLE, CLASSES_TABLE)
_LOG_SUFFIXES = ("_s", "_A", "_C", "_m")
_BATCH_ROWS = 1 << 16


# ------------------------------------------------------------------------------------------------ loading
def load_run_events(run_dirs: Sequence[str | Path], columns: Iterable[str] | None = None) -> pa.Table:
    """Events of one or more run folders, reading only the columns asked for (those a part has).

    Parameters
    ----------
    run_dirs : sequence of path-like
        Run folders (each with ``events.parquet/``).
    columns : iterable of str, optional
        Columns to read besides ``file`` and ``event_id`` (all when None). Missing ones are skipped.

    Returns
    -------
    pyarrow.Table
        Rows sorted by run, file and event_id, with a ``run`` column (the run folder as given).

    Raises
    ------
    ImpactlineError
        When a folder holds no events parts.
    """
    if columns is not None:
        columns = list(dict.fromkeys(columns))
    tables = []
    for run_dir in run_dirs:
        run_dir = Path(run_dir)
        parts = sorted((run_dir / EVENTS_DIR).glob("[!._]*.parquet"))
        if not parts:
            raise ImpactlineError(f"{run_dir}: no events parts in {EVENTS_DIR}/; give run folders made by "
                                  "'impactline run ... --out RUN'")
        for part in parts:
            names = pq.read_schema(part).names
            wanted = names if columns is None else ["file", "event_id"] + [c for c in columns if c in names
                                                                           and c not in ("file", "event_id")]
            table = pq.read_table(part, columns=wanted)
            if table.num_rows:
                table = table.append_column("run", pa.array([str(run_dir)] * table.num_rows, pa.string()))
                tables.append(table.replace_schema_metadata(None))
    if not tables:
        return pa.table({"file": pa.array([], pa.string()), "event_id": pa.array([], pa.int64()),
                         "run": pa.array([], pa.string())})
    table = pa.concat_tables(tables, promote_options="default")
    return table.sort_by([("run", "ascending"), ("file", "ascending"), ("event_id", "ascending")])


def shape_matrix(events: pa.Table, column: str = SHAPE_COLUMN) -> tuple[np.ndarray, np.ndarray]:
    """The shapes as an ``(n_events, points)`` float32 matrix and a mask of usable rows.

    A row is usable when its shape is present and every point is finite (a flat event's shape is NaN).

    Raises
    ------
    ImpactlineError
        When the table has no shape column, with the fix.
    """
    if column not in events.column_names:
        raise ImpactlineError(
            f"the events have no {column!r} column; add the waveform measure to the pipeline "
            "([[measure]] use = \"waveform\") and run it again, or cluster on scalar features "
            "(embedding = \"features\")")
    array = events.column(column).combine_chunks()
    if not pa.types.is_fixed_size_list(array.type):
        lengths = np.unique(pc.list_value_length(array).drop_null().to_numpy(zero_copy_only=False))
        if lengths.size > 1:
            raise ImpactlineError(f"the {column!r} column has rows of different lengths ({lengths.tolist()}); "
                                  "cluster runs made with the same waveform measure (shape length) together")
        array = array.cast(pa.list_(pa.float32(), int(lengths[0]) if lengths.size else 1))
    points = array.type.list_size
    n = len(array)
    out = np.full((n, points), np.nan, dtype=np.float32)
    present = ~array.is_null().to_numpy(zero_copy_only=False)
    if present.any():
        values = array.filter(pa.array(present)).flatten().to_numpy(zero_copy_only=False)
        out[present] = np.asarray(values, dtype=np.float32).reshape(-1, points)
    valid = present & np.all(np.isfinite(out), axis=1)
    return out, valid


def _column_values(events: pa.Table, name: str) -> np.ndarray:
    """A scalar column as float64, nulls as NaN."""
    raw = events.column(name).to_numpy(zero_copy_only=False)
    if raw.dtype != object:
        return np.asarray(raw, dtype=np.float64)
    return np.array([np.nan if v is None else float(v) for v in raw])


def feature_matrix(events: pa.Table, names: Sequence[str] = (), medians: Mapping[str, float] | None = None
                   ) -> tuple[np.ndarray, list[str], dict[str, float]]:
    """Scalar features, transformed and with missing values filled.

    Quantities whose name ends in ``_s``, ``_A``, ``_C`` or ``_m`` enter as log10 of their magnitude
    (durations, currents and charges spread over decades); others (counts, ratios) as they are.
    Non-finite values (and a zero magnitude) are replaced by the column's median.

    Parameters
    ----------
    events : pyarrow.Table
        Events.
    names : sequence of str
        Columns to use; empty for those of :data:`DEFAULT_FEATURES` the table has.
    medians : mapping, optional
        Fill values to use (a trained model's); computed from the data otherwise.

    Returns
    -------
    F : ndarray, shape (n_events, n_features), float64
    used : list of str
        The columns used (a column with no finite value is left out unless ``medians`` gives it).
    medians : dict
        Fill value of each used column (in the transformed unit).

    Raises
    ------
    ImpactlineError
        When a named column is missing.
    """
    if names:
        missing = [c for c in names if c not in events.column_names]
        if missing:
            raise ImpactlineError(f"feature columns {missing} are not in the events; available: "
                                  f"{', '.join(c for c in events.column_names if c not in ('file', 'run'))}")
        candidates = list(names)
    else:
        candidates = [c for c in DEFAULT_FEATURES if c in events.column_names]
    columns, used, fills = [], [], {}
    for name in candidates:
        values = _column_values(events, name)
        if name.endswith(_LOG_SUFFIXES):
            with np.errstate(divide="ignore", invalid="ignore"):
                values = np.log10(np.abs(values))
        finite = np.isfinite(values)
        if medians is not None and name in medians:
            fill = float(medians[name])
        elif finite.any():
            fill = float(np.median(values[finite]))
        else:
            continue
        columns.append(np.where(finite, values, fill))
        used.append(name)
        fills[name] = fill
    matrix = np.column_stack(columns) if columns else np.empty((events.num_rows, 0))
    return matrix, used, fills


def screen_features(events: pa.Table, names: Sequence[str], rows: np.ndarray | None = None,
                    max_missing: float = MAX_MISSING_SHARE) -> tuple[list[str], dict[str, str]]:
    """The scalar features fit for a mixture embedding: continuous and measured on nearly every event.

    Two kinds of column are left out, because both put events on single values (atoms) that a Gaussian
    mixture fits with narrow extra components, so one kind of event is counted as several clusters:

    * integer-valued columns (counts such as ``subpeak_count``): a mixture of continuous densities assumes
      continuous coordinates;
    * columns missing (non-finite) on more than ``max_missing`` of the events: :func:`feature_matrix` fills
      a gap with the column's median, and when a quantity is undefined for a whole kind of event (no decay
      time on a step that stays up) that kind is piled onto one value that belongs to the other kinds.

    Measured on the simulator's five shapes (docs/shapes.md): steps were split into 3-5 components by
    ``subpeak_count`` (noise peaks counted along the plateau, 0 to about 180) and by the median-filled
    ``decay_time_s`` / ``fwhm_s`` (undefined on 55-61 % of the steps).

    Parameters
    ----------
    events : pyarrow.Table
    names : sequence of str
        Candidate columns (present in ``events``).
    rows : ndarray of bool, optional
        Events to judge on (the usable ones); all when None.
    max_missing : float
        Largest share of events a column may lack, 0-1.

    Returns
    -------
    kept : list of str
    dropped : dict
        Column -> reason (``"integer-valued"`` or ``"missing on N % of events"``).
    """
    kept, dropped = [], {}
    for name in names:
        values = _column_values(events, name)
        if rows is not None:
            values = values[rows]
        finite = np.isfinite(values)
        if name.endswith(_LOG_SUFFIXES):
            finite &= values != 0.0  # log10 of a zero magnitude is missing too
        missing = 1.0 - float(finite.mean()) if values.size else 1.0
        if missing > max_missing:
            dropped[name] = f"missing on {100 * missing:.0f} % of events"
        elif finite.any() and np.all(values[finite] == np.round(values[finite])) \
                and not name.endswith(_LOG_SUFFIXES):
            dropped[name] = "integer-valued"
        else:
            kept.append(name)
    return kept, dropped


# ------------------------------------------------------------------------------------------------ embedding
@dataclass
class PCAFit:
    """Principal components of a set of shapes.

    Attributes
    ----------
    mean : ndarray, shape (points,)
    components : ndarray, shape (points, points)
        Rows are unit eigenvectors of the covariance, by decreasing variance; each row's largest
        loading is positive (a fixed sign makes results reproducible).
    variances : ndarray, shape (points,)
        Eigenvalues (variance along each component, ``n - 1`` normalization).
    """

    mean: np.ndarray
    components: np.ndarray
    variances: np.ndarray

    @property
    def explained_ratio(self) -> np.ndarray:
        total = float(np.sum(self.variances))
        return self.variances / total if total > 0 else np.zeros_like(self.variances)

    def transform(self, shapes: np.ndarray, n_components: int) -> np.ndarray:
        """Scores of ``shapes`` on the first ``n_components`` components."""
        out = np.empty((shapes.shape[0], n_components))
        for i in range(0, shapes.shape[0], _BATCH_ROWS):
            block = shapes[i:i + _BATCH_ROWS].astype(np.float64) - self.mean
            out[i:i + _BATCH_ROWS] = block @ self.components[:n_components].T
        return out


def pca_fit(shapes: np.ndarray) -> PCAFit:
    """Exact PCA of ``shapes`` (rows), accumulating the covariance over row batches (bounded memory).

    The result equals :class:`sklearn.decomposition.PCA` (components up to sign, same variances); the
    scatter matrix of 64-point shapes is 64 x 64 whatever the number of events.
    """
    n, points = shapes.shape
    if n < 2:
        raise ImpactlineError(f"PCA needs at least 2 events with a usable shape, got {n}")
    total = np.zeros(points)
    for i in range(0, n, _BATCH_ROWS):
        total += shapes[i:i + _BATCH_ROWS].astype(np.float64).sum(axis=0)
    mean = total / n
    scatter = np.zeros((points, points))
    for i in range(0, n, _BATCH_ROWS):
        block = shapes[i:i + _BATCH_ROWS].astype(np.float64) - mean
        scatter += block.T @ block
    variances, vectors = np.linalg.eigh(scatter / (n - 1))
    order = np.argsort(variances)[::-1]
    variances = np.clip(variances[order], 0.0, None)
    components = vectors[:, order].T
    signs = np.sign(components[np.arange(points), np.argmax(np.abs(components), axis=1)])
    components *= np.where(signs == 0, 1.0, signs)[:, None]
    return PCAFit(mean=mean, components=components, variances=variances)


def _auto_count(ratios: np.ndarray) -> int:
    """Fewest leading items whose share of the variance reaches :data:`AUTO_VARIANCE`, within bounds."""
    count = int(np.searchsorted(np.cumsum(ratios), AUTO_VARIANCE) + 1)
    return int(np.clip(count, AUTO_COMPONENTS[0], min(AUTO_COMPONENTS[1], ratios.size)))


def wavelet_features(shapes: np.ndarray) -> np.ndarray:
    """All coefficients of a :data:`WAVELET_LEVELS`-level Haar transform of each shape (pywt), side by side.

    Haar wavelets over four levels for spike shapes follow Quiroga, Nadasdy & Ben-Shaul (2004), Neural
    Computation 16:1661-1687 (from memory). The transform is orthogonal, so the coefficients hold the
    shapes' variance unchanged.
    """
    import pywt

    level = min(WAVELET_LEVELS, pywt.dwt_max_level(shapes.shape[1], WAVELET))
    coefficients = pywt.wavedec(shapes.astype(np.float64), WAVELET, level=max(level, 1), axis=1)
    return np.concatenate(coefficients, axis=1)


@dataclass
class Embedding:
    """Points to cluster: one row per usable event.

    Attributes
    ----------
    X : ndarray, shape (n_usable, d)
        Standardized coordinates.
    valid : ndarray of bool, shape (n_events,)
        Which events have a row in ``X`` (events without a usable shape have none).
    info : dict
        What was done: method, components, variance kept, features used (for reports).
    """

    X: np.ndarray
    valid: np.ndarray
    info: dict[str, Any] = field(default_factory=dict)


def asinh_transform(shapes: np.ndarray, floor: float) -> np.ndarray:
    """``asinh(shape / c)`` with ``c = floor x`` the median over events of the largest ``|shape|`` point.

    Linear below ``c`` (noise stays noise) and logarithmic above it, with the sign kept, so a slow tail at
    a few per cent of the peak weighs as much as the peak itself: exponential decays become straight
    lines whose slopes the clustering can tell apart. The inverse hyperbolic sine as a signed
    logarithm with a linear core: Lupton, Gunn & Szalay (1999), Astron. J. 118:1406-1410.
    """
    shapes = shapes.astype(np.float64)
    if shapes.size == 0:
        return shapes
    typical = float(np.median(np.max(np.abs(shapes), axis=1)))
    scale = floor * typical if typical > 0 else 1.0
    return np.arcsinh(shapes / scale)


def embed(events: pa.Table, method: str = "pca+features", components: int = 0, features: Sequence[str] = (),
          transform: str = "asinh", floor: float = 0.01) -> Embedding:
    """Coordinates for clustering.

    Parameters
    ----------
    events : pyarrow.Table
        Events (with a ``shape`` column for the shape-based methods).
    method : {"pca", "wavelet", "features", "pca+features"}
        See the module docstring.
    components : int
        Components (PCA) or coefficients (wavelet) kept; 0 keeps the fewest that hold 95 % of the
        variance, between 2 and 16.
    features : sequence of str
        Scalar columns (``features`` methods); empty for the defaults present that pass
        :func:`screen_features` (those left out are listed in ``info["features_dropped"]``).
    transform : {"asinh", "none"}
        Shapes enter as they are or through :func:`asinh_transform` (before PCA or wavelets).
    floor : float
        Linear range of the asinh transform, as a fraction of the typical shape maximum.

    Returns
    -------
    Embedding
        Shape blocks are divided by the standard deviation of their first coordinate (the relative
        geometry of the shapes is kept: scaling every component to unit variance would blow noise up
        to the size of the signal); feature columns are standardized one by one (z-scores).
    """
    if method not in EMBEDDINGS:
        raise ImpactlineError(f"unknown embedding {method!r}; choose one of {', '.join(EMBEDDINGS)}")
    n = events.num_rows
    blocks: list[np.ndarray] = []
    info: dict[str, Any] = {"method": method, "events": n}
    valid = np.ones(n, dtype=bool)
    if method in ("pca", "wavelet", "pca+features"):
        if transform not in SHAPE_TRANSFORMS:
            raise ImpactlineError(f"unknown shape transform {transform!r}; choose one of {', '.join(SHAPE_TRANSFORMS)}")
        shapes, valid = shape_matrix(events)
        usable = shapes[valid]
        if transform == "asinh":
            usable = asinh_transform(usable, floor)
        info.update(shape_points=shapes.shape[1], transform=transform)
        if method == "wavelet":
            coefficients = wavelet_features(usable)
            variances = coefficients.var(axis=0)
            ratios = variances / variances.sum() if variances.sum() > 0 else np.zeros_like(variances)
            # Stable sort: ties keep the lower index, so the choice is reproducible.
            order = np.argsort(-variances, kind="stable")
            m = components or _auto_count(ratios[order])
            keep = np.sort(order[:m])
            block = coefficients[:, keep]
            info.update(components=int(m), variance_kept=float(ratios[keep].sum()), wavelet=WAVELET)
            scale = float(np.sqrt(variances[order[0]]))
        else:
            fit = pca_fit(usable)
            m = min(components or _auto_count(fit.explained_ratio), usable.shape[1])
            block = fit.transform(usable, m)
            info.update(components=int(m), variance_kept=float(fit.explained_ratio[:m].sum()))
            scale = float(np.sqrt(fit.variances[0]))
        blocks.append(block / scale if scale > 0 else block)
    if method in ("features", "pca+features"):
        names = list(features)
        if not names:
            names, dropped = screen_features(events, [c for c in DEFAULT_FEATURES if c in events.column_names],
                                             valid)
            info["features_dropped"] = dropped
        matrix, used, _ = feature_matrix(events, names) if names else (np.empty((n, 0)), [], {})
        matrix = matrix[valid]
        if not used:
            left_out = "; ".join(f"{k}: {v}" for k, v in info.get("features_dropped", {}).items())
            raise ImpactlineError("no usable scalar feature in the events (looked for "
                                  f"{', '.join(features or DEFAULT_FEATURES)}"
                                  + (f"; left out {left_out}; name them with --features to use them anyway"
                                     if left_out else "") + ")")
        std = matrix.std(axis=0)
        keep = std > 0
        blocks.append((matrix[:, keep] - matrix[:, keep].mean(axis=0)) / std[keep])
        info["features"] = [name for name, k in zip(used, keep, strict=True) if k]
    X = np.concatenate(blocks, axis=1) if len(blocks) > 1 else blocks[0]
    info["usable"] = int(valid.sum())
    return Embedding(X=np.ascontiguousarray(X), valid=valid, info=info)


# ------------------------------------------------------------------------------------------------ summaries
def _group_slices(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray, list[np.ndarray]]:
    order = np.argsort(labels, kind="stable")
    values, starts, counts = np.unique(labels[order], return_index=True, return_counts=True)
    return values, counts, [order[s:s + c] for s, c in zip(starts, counts, strict=True)]


def prototypes(events: pa.Table, labels: np.ndarray) -> pa.Table:
    """One row per cluster (``-1``: unassigned): size, median shape and its spread, median features.

    Spread per point: the median absolute deviation (unscaled) and the 10th and 90th percentiles.

    Parameters
    ----------
    events : pyarrow.Table
        Events (``shape`` and the default scalar features used when present).
    labels : ndarray of int, shape (n_events,)
        Cluster of each event.

    Returns
    -------
    pyarrow.Table
        Columns ``cluster``, ``n_events``, ``fraction``, ``shape_median``, ``shape_mad``, ``shape_p10``,
        ``shape_p90`` (with a shape column) and ``median_<feature>`` for each default feature present.
    """
    labels = np.asarray(labels, dtype=np.int64)
    values, counts, groups = _group_slices(labels)
    columns: dict[str, Column] = {
        "cluster": Column("int64", "", "cluster number (-1: unassigned)"),
        "n_events": Column("int64", "", "events in the cluster"),
        "fraction": Column("float64", "", "share of all events"),
    }
    data: dict[str, list] = {"cluster": values.tolist(), "n_events": counts.tolist(),
                             "fraction": (counts / max(labels.size, 1)).tolist()}
    if SHAPE_COLUMN in events.column_names:
        shapes, valid = shape_matrix(events)
        points = shapes.shape[1]
        stats: dict[str, list] = {"shape_median": [], "shape_mad": [], "shape_p10": [], "shape_p90": []}
        for rows in groups:
            block = shapes[rows[valid[rows]]].astype(np.float64)
            if block.shape[0] == 0:
                for key in stats:
                    stats[key].append([math.nan] * points)
                continue
            median = np.median(block, axis=0)
            p10, p90 = np.percentile(block, [10, 90], axis=0)
            stats["shape_median"].append(median.astype(np.float32).tolist())
            stats["shape_mad"].append(np.median(np.abs(block - median), axis=0).astype(np.float32).tolist())
            stats["shape_p10"].append(p10.astype(np.float32).tolist())
            stats["shape_p90"].append(p90.astype(np.float32).tolist())
        docs = {"shape_median": "median shape, point by point", "shape_mad": "median absolute deviation per point",
                "shape_p10": "10th percentile per point", "shape_p90": "90th percentile per point"}
        for key, doc in docs.items():
            columns[key] = Column("list<float32>", "", doc, length=points)
            data[key] = stats[key]
    for name in DEFAULT_FEATURES:
        if name not in events.column_names:
            continue
        values_f = np.asarray(events.column(name).to_numpy(zero_copy_only=False), dtype=np.float64)
        unit = next((s[1:] for s in _LOG_SUFFIXES if name.endswith(s)), "")
        columns[f"median_{name}"] = Column("float64", unit, f"median {name} of the cluster's events")
        medians = []
        for rows in groups:
            finite = values_f[rows][np.isfinite(values_f[rows])]
            medians.append(float(np.median(finite)) if finite.size else math.nan)
        data[f"median_{name}"] = medians
    schema = schema_for(columns)
    return pa.Table.from_arrays([pa.array(data[name], type=schema.field(name).type) for name in columns],
                                schema=schema)


def cluster_sizes(events: pa.Table, labels: np.ndarray) -> pa.Table:
    """Events per file and cluster: ``file``, ``cluster``, ``n_events``, ``fraction`` (of the file's events)."""
    labels = np.asarray(labels, dtype=np.int64)
    files = events.column("file").to_numpy(zero_copy_only=False).astype(str)
    names, file_index = np.unique(files, return_inverse=True)
    values, cluster_index = np.unique(labels, return_inverse=True)
    counts = np.zeros((names.size, values.size), dtype=np.int64)
    np.add.at(counts, (file_index, cluster_index), 1)
    f, c = np.nonzero(counts)
    totals = counts.sum(axis=1)
    columns = {
        "file": Column("string", "", "input file path"),
        "cluster": Column("int64", "", "cluster number (-1: unassigned)"),
        "n_events": Column("int64", "", "events of the file in the cluster"),
        "fraction": Column("float64", "", "share of the file's events"),
    }
    schema = schema_for(columns)
    return pa.Table.from_arrays([pa.array(names[f]), pa.array(values[c], pa.int64()),
                                 pa.array(counts[f, c], pa.int64()),
                                 pa.array(counts[f, c] / totals[f], pa.float64())], schema=schema)


def selection_table(rows: Sequence[Mapping[str, Any]]) -> pa.Table:
    """The model-selection report: one row per candidate cluster count.

    Each row: ``method``, ``k``, ``criterion`` (``silhouette``, ``bic``, ``fixed``, ``density``,
    ``entropy`` or ``min_share``), ``score`` (the criterion's value; for ``density``, the share of events
    left unassigned; for ``entropy``, the entropy in nats of the combined clustering; NaN when none),
    ``better`` (``higher``,
    ``lower`` or, for ``entropy``, ``elbow``), ``chosen``. Rows of a combination of mixture components
    (``criterion = "entropy"``, one per number of clusters from the mixture's down to 1) also fill
    ``merged_events`` (cumulative events merged), ``elbow_rss``, ``merge`` (the two clusters joined at this
    step, as component sets), ``groups`` (the clusters, as component sets), ``silhouette`` (the step's mean
    silhouette, when the count rule is the silhouette) and ``decision`` (how the count was chosen: ``elbow``,
    ``silhouette``, ``flat``, ``few`` or ``fixed``); other rows leave them null. A ``criterion = "min_share"``
    row (Gaussian mixture) gives the clusters kept (``k``), the share of events in clusters too small to
    count (``score``), what became of those events (``decision``: ``unassign`` or ``reassign``) and those
    clusters as component sets (``groups``).
    """
    columns = {
        "method": Column("string", "", "clustering method"),
        "k": Column("int64", "", "number of clusters tried (found, for density clustering)"),
        "criterion": Column("string", "", "how the number of clusters was chosen"),
        "score": Column("float64", "", "value of the criterion"),
        "better": Column("string", "", "whether a higher or a lower score is better (entropy: its elbow)"),
        "chosen": Column("bool", "", "the count that was kept"),
        "merged_events": Column("int64", "", "entropy rows: cumulative number of events in merged clusters"),
        "elbow_rss": Column("float64", "", "entropy rows: residual sum of squares of the elbow fit at this count"),
        "silhouette": Column("float64", "", "entropy rows: mean silhouette of this step (count_rule silhouette)"),
        "merge": Column("string", "", "entropy rows: the two clusters (component sets) merged at this step"),
        "groups": Column("string", "", "entropy rows: the clusters as sets of mixture components; "
                                       "min_share row: the clusters too small to count"),
        "decision": Column("string", "", "entropy rows: elbow, silhouette, flat (no merge), few (too few "
                                         "components), fixed; min_share row: unassign or reassign"),
    }
    schema = schema_for(columns)
    return pa.Table.from_arrays([pa.array([row.get(name) for row in rows], type=schema.field(name).type)
                                 for name in columns], schema=schema)


# ------------------------------------------------------------------------------------------------ sidecars
def write_sidecar(table: pa.Table, run_dir: str | Path, name: str, metadata: Mapping[str, str] | None = None) -> Path:
    """Write ``table`` as ``run_dir/name`` atomically (metadata added to the file metadata); return the path."""
    merged = dict(table.schema.metadata or {})
    merged.update({k.encode(): str(v).encode() for k, v in (metadata or {}).items()})
    path = Path(run_dir) / name
    write_table_atomic(table.replace_schema_metadata(merged), path)
    return path


def read_events_with(run_dir: str | Path, sidecars: Sequence[str] = SIDECAR_TABLES) -> pa.Table:
    """All events of a run folder (``output.read_events``) with the shape sidecars that exist joined in."""
    run_dir = Path(run_dir)
    events = read_events(run_dir)
    for name in sidecars:
        path = run_dir / name
        if path.exists():
            events = join_sidecar(events, pq.read_table(path))
    return events


def read_label_file(path: str | Path) -> pa.Table:
    """A table of hand labels: columns ``file``, ``event_id``, ``label`` (CSV or Parquet).

    Raises
    ------
    ImpactlineError
        When the file cannot be read or lacks a column, naming the file and the columns found.
    """
    import pyarrow.csv as pacsv

    path = Path(path)
    try:
        if path.suffix.lower() in (".parquet", ".pq"):
            table = pq.read_table(path)
        else:
            table = pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(
                column_types={"file": pa.string(), "label": pa.string(), "event_id": pa.int64()}))
    except (OSError, pa.ArrowInvalid) as exc:
        raise ImpactlineError(f"{path}: cannot read the labels ({exc}); give a CSV or Parquet file with columns "
                              "file, event_id, label") from None
    missing = [c for c in ("file", "event_id", "label") if c not in table.column_names]
    if missing:
        raise ImpactlineError(f"{path}: missing column(s) {missing}; found {table.column_names}; the labels "
                              "need file, event_id and label")
    table = table.select(["file", "event_id", "label"]).cast(pa.schema([("file", pa.string()),
                                                                        ("event_id", pa.int64()),
                                                                        ("label", pa.string())]))
    return table.filter(pc.is_valid(table.column("label")))


def match_labels(events: pa.Table, labels: pa.Table) -> tuple[np.ndarray, np.ndarray, int]:
    """Rows of ``events`` that carry a hand label, and the labels.

    A label's ``file`` matches an event's ``file`` exactly, else by absolute path, else by file name
    when that name is unique among the events' files (hand-made label sheets often hold bare names).

    Returns
    -------
    rows : ndarray of int
        Indices into ``events``.
    names : ndarray of str
        The label of each of those rows.
    unmatched : int
        Labels that found no event.
    """
    files = events.column("file").to_numpy(zero_copy_only=False).astype(str)
    ids = np.asarray(events.column("event_id").to_numpy(zero_copy_only=False), dtype=np.int64)
    unique_files = np.unique(files)
    by_abs = {str(Path(f).resolve()): f for f in unique_files}
    base_counts: dict[str, int] = {}
    for f in unique_files:
        base_counts[Path(f).name] = base_counts.get(Path(f).name, 0) + 1
    by_name = {Path(f).name: f for f in unique_files if base_counts[Path(f).name] == 1}
    index = {(f, int(i)): r for r, (f, i) in enumerate(zip(files, ids, strict=True))}
    rows, names, unmatched = [], [], 0
    known = set(unique_files)
    for f, i, label in zip(labels.column("file").to_pylist(), labels.column("event_id").to_pylist(),
                           labels.column("label").to_pylist(), strict=True):
        target = f if f in known else by_abs.get(str(Path(f).resolve())) or by_name.get(Path(f).name)
        row = index.get((target, int(i))) if target is not None and i is not None else None
        if row is None:
            unmatched += 1
            continue
        rows.append(row)
        names.append(label)
    return np.asarray(rows, dtype=np.int64), np.asarray(names, dtype=str), unmatched


# ------------------------------------------------------------------------------------------------ trained models
MODEL_FORMAT = "impactline-forest"
MODEL_FORMAT_VERSION = 1


def model_inputs(events: pa.Table, use_shape: bool, features: Sequence[str],
                 medians: Mapping[str, float] | None = None) -> tuple[np.ndarray, np.ndarray, list[str], dict]:
    """The matrix a trained model sees: shape points (optional) then transformed scalar features.

    Returns ``(X, valid, names, medians)``; rows without a usable shape are not valid when shapes are used.
    """
    blocks, names = [], []
    valid = np.ones(events.num_rows, dtype=bool)
    if use_shape:
        shapes, valid = shape_matrix(events)
        blocks.append(np.nan_to_num(shapes.astype(np.float64)))
        names += [f"shape[{i}]" for i in range(shapes.shape[1])]
    matrix, used, fills = feature_matrix(events, features, medians)
    if features and len(used) != len(features):
        lost = sorted(set(features) - set(used))
        raise ImpactlineError(f"feature columns {lost} hold no finite value; leave them out with --features")
    blocks.append(matrix)
    names += used
    X = np.concatenate(blocks, axis=1) if blocks else np.empty((events.num_rows, 0))
    return X, valid, names, fills


@dataclass
class ForestModel:
    """A random forest as plain arrays, with the description of its inputs.

    Trees are stored concatenated: node ``j`` of tree ``t`` is row ``offsets[t] + j`` of ``left``,
    ``right`` (child node numbers within the tree, -1 at leaves), ``feature``, ``threshold`` and
    ``value`` (class fractions at the node). Prediction follows scikit-learn's decision trees exactly:
    inputs are rounded to float32, a sample goes left when ``x[feature] <= threshold``, each tree's leaf
    fractions are normalized, summed over trees in order and divided by the number of trees.

    Attributes
    ----------
    classes : list of str
    input_names : list of str
        ``shape[i]`` points then scalar feature columns.
    use_shape : bool
    features : list of str
        Scalar feature columns (see :func:`feature_matrix`).
    medians : dict
        Fill values of the features (transformed units), from the training data.
    offsets, left, right, feature, threshold, value : ndarray
    meta : dict
        Training record (cross-validated accuracy, confusion matrix, runs, settings, versions).
    """

    classes: list[str]
    input_names: list[str]
    use_shape: bool
    features: list[str]
    medians: dict[str, float]
    offsets: np.ndarray
    left: np.ndarray
    right: np.ndarray
    feature: np.ndarray
    threshold: np.ndarray
    value: np.ndarray
    meta: dict[str, Any] = field(default_factory=dict)

    @classmethod
    def from_sklearn(cls, forest, classes: Sequence[str], input_names: Sequence[str], use_shape: bool,
                     features: Sequence[str], medians: Mapping[str, float], meta: Mapping[str, Any] | None = None
                     ) -> ForestModel:
        """Export a fitted :class:`sklearn.ensemble.RandomForestClassifier` (single output)."""
        trees = [estimator.tree_ for estimator in forest.estimators_]
        if any(t.n_outputs != 1 for t in trees):
            raise ValueError("only single-output forests can be exported")
        sizes = np.array([t.node_count for t in trees], dtype=np.int64)
        return cls(
            classes=[str(c) for c in classes], input_names=list(input_names), use_shape=bool(use_shape),
            features=list(features), medians={k: float(v) for k, v in medians.items()},
            offsets=np.concatenate(([0], np.cumsum(sizes))).astype(np.int64),
            left=np.concatenate([t.children_left for t in trees]).astype(np.int64),
            right=np.concatenate([t.children_right for t in trees]).astype(np.int64),
            feature=np.concatenate([t.feature for t in trees]).astype(np.int64),
            threshold=np.concatenate([t.threshold for t in trees]).astype(np.float64),
            value=np.concatenate([t.value[:, 0, :] for t in trees]).astype(np.float64),
            meta=dict(meta or {}),
        )

    @property
    def n_trees(self) -> int:
        return int(self.offsets.size - 1)

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        """Class probabilities, shape ``(n, n_classes)`` (the mean of the trees' leaf fractions)."""
        X = np.asarray(X, dtype=np.float32).astype(np.float64)
        if X.ndim != 2 or X.shape[1] != len(self.input_names):
            raise ImpactlineError(f"the model expects {len(self.input_names)} inputs per event, got "
                                  f"{X.shape[1] if X.ndim == 2 else X.shape}")
        n = X.shape[0]
        rows = np.arange(n)
        total = np.zeros((n, len(self.classes)))
        for t in range(self.n_trees):
            base = self.offsets[t]
            node = np.zeros(n, dtype=np.int64)
            active = self.left[base + node] >= 0
            while active.any():
                idx = base + node[active]
                go_left = X[rows[active], self.feature[idx]] <= self.threshold[idx]
                node[active] = np.where(go_left, self.left[idx], self.right[idx])
                active = self.left[base + node] >= 0
            leaf = self.value[base + node]
            norm = leaf.sum(axis=1, keepdims=True)
            total += leaf / np.where(norm == 0.0, 1.0, norm)
        return total / self.n_trees

    def predict(self, X: np.ndarray) -> np.ndarray:
        """Most probable class of each row (first class on ties, as scikit-learn)."""
        return np.asarray(self.classes)[np.argmax(self.predict_proba(X), axis=1)]

    def save(self, path: str | Path) -> Path:
        """Write the model as a ``.npz`` of plain arrays with a JSON header (``header`` entry); no pickle."""
        path = Path(path)
        if path.suffix != ".npz":
            path = path.with_name(path.name + ".npz")
        header = {"format": MODEL_FORMAT, "format_version": MODEL_FORMAT_VERSION, "classes": self.classes,
                  "input_names": self.input_names, "use_shape": self.use_shape, "features": self.features,
                  "medians": self.medians, "meta": self.meta}
        path.parent.mkdir(parents=True, exist_ok=True)
        temporary = path.with_name(f".{path.name}.tmp.npz")
        np.savez_compressed(temporary, header=np.array(json.dumps(header, default=_json_default)),
                            offsets=self.offsets, left=self.left, right=self.right, feature=self.feature,
                            threshold=self.threshold, value=self.value)
        temporary.replace(path)
        return path

    @classmethod
    def load(cls, path: str | Path) -> ForestModel:
        """Read a model written by :meth:`save` (``allow_pickle=False``: a file cannot run code).

        Raises
        ------
        ImpactlineError
            When the file is missing, not such a model, or its arrays do not fit together.
        """
        path = Path(path)
        try:
            with np.load(path, allow_pickle=False) as data:
                header = json.loads(str(data["header"]))
                if not isinstance(header, dict) or header.get("format") != MODEL_FORMAT \
                        or header.get("format_version") != MODEL_FORMAT_VERSION:
                    found = header.get("format") if isinstance(header, dict) else None
                    version = header.get("format_version") if isinstance(header, dict) else None
                    raise ImpactlineError(f"{path}: model format {found!r} version {version!r}; this impactline "
                                          f"reads {MODEL_FORMAT!r} version {MODEL_FORMAT_VERSION}")
                arrays = {k: data[k] for k in ("offsets", "left", "right", "feature", "threshold", "value")}
        except (OSError, KeyError, ValueError) as exc:
            raise ImpactlineError(f"{path}: not a model written by 'impactline train' ({exc}); train one with "
                                  "'impactline train RUN --labels FILE --out MODEL.npz'") from None
        model = cls(classes=header["classes"], input_names=header["input_names"], use_shape=header["use_shape"],
                    features=header["features"], medians=header["medians"], meta=header.get("meta", {}),
                    **arrays)
        nodes = int(model.offsets[-1])
        if any(a.shape[0] != nodes for a in (model.left, model.right, model.feature, model.threshold, model.value)) \
                or model.value.shape[1] != len(model.classes) \
                or (model.feature[model.left >= 0] >= len(model.input_names)).any():
            raise ImpactlineError(f"{path}: the model's arrays do not fit together (corrupted file?)")
        return model

    def inputs(self, events: pa.Table) -> tuple[np.ndarray, np.ndarray]:
        """The model's input matrix for ``events`` and the mask of rows it can label."""
        X, valid, names, _ = model_inputs(events, self.use_shape, self.features, self.medians)
        if names != self.input_names:
            raise ImpactlineError(f"the events give inputs {_brief(names)} but the model was trained on "
                                  f"{_brief(self.input_names)}; use the same waveform measure and features")
        return X, valid


def _brief(names: Sequence[str]) -> str:
    shape_points = sum(n.startswith("shape[") for n in names)
    rest = [n for n in names if not n.startswith("shape[")]
    return (f"{shape_points} shape points + " if shape_points else "") + (", ".join(rest) or "no features")


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    return str(value)
