"""Unsupervised grouping of event shapes: k-means, Gaussian mixtures chosen by BIC, density-based (HDBSCAN).

All three embed the events the same way (:func:`impactline.shapes.embed`), number clusters by decreasing
size (0 is the largest; ties go to the cluster whose first event comes first) and leave events without a
usable shape unassigned (``cluster = -1``). After :meth:`fit_predict` each stage holds ``selection_``,
the model-selection table (:func:`impactline.shapes.selection_table`), and ``embedding_``, what the
embedding did; ``impactline cluster`` writes both to the run folders.

Large runs: the model is fitted on at most ``fit_sample`` events drawn with the seed, and every event is
then assigned; the silhouette criterion is computed on at most 4000 events (it costs the square of the
count). Everything random takes ``seed``, so the same events and settings give the same clusters.
"""

from __future__ import annotations

import math
from typing import Any, ClassVar

import numpy as np
import pyarrow as pa
from impactline import Classifier, Column, Param
from impactline.shapes import EMBEDDINGS, SHAPE_TRANSFORMS, Embedding, embed, selection_table

__all__ = ["KMeansShapes", "GaussianMixtureShapes", "DensityShapes", "relabel_by_size", "SILHOUETTE_SAMPLE"]

#: Most events the silhouette criterion is computed on.
SILHOUETTE_SAMPLE = 4000

_COMMON_PARAMS: dict[str, Param] = {
    "embedding": Param("pca+features", kind=str, choices=EMBEDDINGS,
                       doc="coordinates: PCA or Haar-wavelet coefficients of the shapes, scalar features, or both"),
    "transform": Param("asinh", kind=str, choices=SHAPE_TRANSFORMS,
                       doc="shapes through asinh (log-like above 'floor', so tails count) or as they are"),
    "floor": Param(0.01, low=0, low_inclusive=False,
                   doc="linear range of the asinh transform, as a fraction of the typical shape maximum"),
    "components": Param(0, kind=int, low=0, high=64,
                        doc="PCA components / wavelet coefficients kept; 0: enough for 95 % of the variance (2-16)"),
    "features": Param([], kind=list, doc="scalar columns for the features embeddings; empty: the standard ones"),
    "seed": Param(0, kind=int, low=0, doc="seed of every random choice (same seed, same clusters)"),
}
_CLUSTER_COLUMN = Column("int64", "", "cluster number, 0 = largest; -1: unassigned (no usable shape, or noise)")
_COUNT_COLUMN = Column("int64", "", "number of clusters found or chosen (same on every row)")


def relabel_by_size(labels: np.ndarray) -> np.ndarray:
    """Renumber clusters 0, 1, ... by decreasing size (ties: first appearance first); -1 stays -1."""
    labels = np.asarray(labels, dtype=np.int64)
    out = np.full_like(labels, -1)
    assigned = labels >= 0
    if not assigned.any():
        return out
    values, first, counts = np.unique(labels[assigned], return_index=True, return_counts=True)
    order = np.lexsort((first, -counts))
    mapping = np.empty(values.max() + 1, dtype=np.int64)
    mapping[values[order]] = np.arange(values.size)
    out[assigned] = mapping[labels[assigned]]
    return out


def _sample(n: int, limit: int, rng: np.random.Generator) -> np.ndarray:
    """Sorted indices of at most ``limit`` of ``n`` rows (all when ``limit`` is 0 or large enough)."""
    if limit <= 0 or n <= limit:
        return np.arange(n)
    return np.sort(rng.choice(n, size=limit, replace=False))


class _ShapeClusterer(Classifier):
    """Shared embedding, sampling and bookkeeping of the clustering stages."""

    method: ClassVar[str] = ""
    selection_: pa.Table | None = None
    embedding_: dict[str, Any] | None = None

    def fit_predict(self, events: pa.Table) -> dict[str, np.ndarray]:
        """Cluster every event of ``events``; one array per declared column, in the table's row order.

        Parameters
        ----------
        events : pyarrow.Table
            The run's events (a ``shape`` column unless ``embedding = "features"``).

        Returns
        -------
        dict of ndarray
            ``cluster`` (-1 unassigned) and the stage's other columns.
        """
        emb = embed(events, self.embedding, self.components, self.features, self.transform, self.floor)
        self.embedding_ = emb.info
        n = events.num_rows
        out = {name: np.full(n, -1 if column.dtype == "int64" else math.nan,
                             dtype=np.int64 if column.dtype == "int64" else np.float64)
               for name, column in self.columns.items()}
        usable = emb.X.shape[0]
        if usable < 2:
            self.selection_ = selection_table([])
            out["cluster_count"][:] = 0
            return out
        labels, extra, rows = self._cluster(emb)
        labels = relabel_by_size(labels)
        self.selection_ = selection_table(rows)
        out["cluster"][emb.valid] = labels
        for name, values in extra.items():
            out[name][emb.valid] = values
        out["cluster_count"][:] = int(np.unique(labels[labels >= 0]).size)
        return out

    def _cluster(self, emb: Embedding) -> tuple[np.ndarray, dict[str, np.ndarray], list[dict[str, Any]]]:
        raise NotImplementedError


class KMeansShapes(_ShapeClusterer):
    """k-means on the embedded shapes; the number of clusters chosen by the mean silhouette.

    With ``k = 0`` every count from 2 to ``max_k`` is fitted and the one with the highest mean
    silhouette coefficient wins (Rousseeuw 1987, J. Comput. Appl. Math. 20:53-65: s = (b - a) / max(a,
    b) per point, a = mean distance within its cluster, b = to the nearest other cluster), computed
    with :func:`sklearn.metrics.silhouette_score` on up to 4000 events. k-means itself is Lloyd's
    algorithm with k-means++ starts (:class:`sklearn.cluster.KMeans`).
    """

    name: ClassVar[str] = "kmeans"
    summary: ClassVar[str] = "k-means on event shapes; number of clusters by the mean silhouette"
    version: ClassVar[str] = "1"
    method: ClassVar[str] = "kmeans"
    params: ClassVar[dict[str, Param]] = {
        **_COMMON_PARAMS,
        "k": Param(0, kind=int, low=0, high=100, doc="number of clusters; 0 chooses it by the silhouette"),
        "max_k": Param(10, kind=int, low=2, high=100, doc="largest count tried when k = 0"),
        "n_init": Param(4, kind=int, low=1, high=50, doc="k-means++ restarts per count (the best is kept)"),
        "fit_sample": Param(100_000, kind=int, low=0, doc="most events k-means is fitted on (0: all)"),
    }
    columns: ClassVar[dict[str, Column]] = {
        "cluster": _CLUSTER_COLUMN,
        "cluster_distance": Column("float64", "", "distance to the cluster centre, in embedding units"),
        "cluster_count": _COUNT_COLUMN,
        "cluster_silhouette": Column("float64", "", "mean silhouette of the clustering kept (same on every row)"),
    }

    def _cluster(self, emb: Embedding):
        from sklearn.cluster import KMeans

        X = emb.X
        rng = np.random.default_rng(self.seed)
        fit_rows = _sample(X.shape[0], self.fit_sample, rng)
        score_rows = _sample(X.shape[0], SILHOUETTE_SAMPLE, rng)
        candidates = [self.k] if self.k else list(range(2, min(self.max_k, X.shape[0] - 1) + 1))
        results = []
        for k in candidates:
            model = KMeans(n_clusters=k, n_init=self.n_init, random_state=self.seed).fit(X[fit_rows])
            labels = model.predict(X)
            results.append((k, model, labels, _silhouette(X[score_rows], labels[score_rows], self.seed)))
        best = (max(range(len(results)), key=lambda i: (np.nan_to_num(results[i][3], nan=-2.0), -i))
                if not self.k else 0)
        k, model, labels, score = results[best]
        criterion = "fixed" if self.k else "silhouette"
        rows = [{"method": self.method, "k": r[0], "criterion": criterion, "score": r[3], "better": "higher",
                 "chosen": i == best} for i, r in enumerate(results)]
        distance = np.min(model.transform(X), axis=1)
        return labels, {"cluster_distance": distance, "cluster_silhouette": np.full(X.shape[0], score)}, rows


def _silhouette(X: np.ndarray, labels: np.ndarray, seed: int) -> float:
    from sklearn.metrics import silhouette_score

    if np.unique(labels).size < 2 or np.unique(labels).size >= labels.size:
        return math.nan
    return float(silhouette_score(X, labels, random_state=seed))


class GaussianMixtureShapes(_ShapeClusterer):
    """Gaussian mixture on the embedded shapes; the number of components chosen by the BIC.

    With ``k = 0`` mixtures of 1 to ``max_k`` full-covariance components are fitted by EM
    (:class:`sklearn.mixture.GaussianMixture`) and the one with the lowest Bayesian information
    criterion, BIC = -2 ln L + p ln n, is kept (Schwarz 1978, Annals of Statistics 6:461-464). Each
    event goes to its most probable component; ``cluster_probability`` is that posterior probability.
    """

    name: ClassVar[str] = "gmm"
    summary: ClassVar[str] = "Gaussian mixture on event shapes; number of components by BIC"
    version: ClassVar[str] = "1"
    method: ClassVar[str] = "gmm"
    params: ClassVar[dict[str, Param]] = {
        **_COMMON_PARAMS,
        "k": Param(0, kind=int, low=0, high=100, doc="number of components; 0 chooses it by BIC"),
        "max_k": Param(10, kind=int, low=1, high=100, doc="largest count tried when k = 0"),
        "covariance": Param("full", kind=str, choices=("full", "diag", "tied", "spherical"),
                            doc="covariance of each component"),
        "n_init": Param(2, kind=int, low=1, high=50, doc="EM restarts per count (the best likelihood is kept)"),
        "reg_covar": Param(1e-4, low=0, low_inclusive=False,
                           doc="variance added to each covariance diagonal (coordinates are of order 1)"),
        "fit_sample": Param(20_000, kind=int, low=0, doc="most events the mixtures are fitted on (0: all)"),
    }
    columns: ClassVar[dict[str, Column]] = {
        "cluster": _CLUSTER_COLUMN,
        "cluster_probability": Column("float64", "", "posterior probability of the assigned component"),
        "cluster_count": _COUNT_COLUMN,
        "cluster_bic": Column("float64", "", "BIC of the mixture kept, on the fitted events (same on every row)"),
    }

    def _cluster(self, emb: Embedding):
        from sklearn.mixture import GaussianMixture

        X = emb.X
        fit_rows = _sample(X.shape[0], self.fit_sample, np.random.default_rng(self.seed))
        Xf = X[fit_rows]
        candidates = [self.k] if self.k else list(range(1, min(self.max_k, Xf.shape[0] - 1) + 1))
        fits = []
        for k in candidates:
            model = GaussianMixture(n_components=k, covariance_type=self.covariance, n_init=self.n_init,
                                    random_state=self.seed, reg_covar=self.reg_covar).fit(Xf)
            fits.append((k, model, float(model.bic(Xf))))
        best = int(np.argmin([f[2] for f in fits]))
        k, model, bic = fits[best]
        criterion = "fixed" if self.k else "bic"
        rows = [{"method": self.method, "k": f[0], "criterion": criterion, "score": f[2], "better": "lower",
                 "chosen": i == best} for i, f in enumerate(fits)]
        posterior = model.predict_proba(X)
        labels = np.argmax(posterior, axis=1)
        return labels, {"cluster_probability": posterior[np.arange(X.shape[0]), labels],
                        "cluster_bic": np.full(X.shape[0], bic)}, rows


class DensityShapes(_ShapeClusterer):
    """Density-based clusters (HDBSCAN); events in sparse regions stay unassigned (``cluster = -1``).

    HDBSCAN (Campello, Moulavi & Sander 2013, PAKDD, LNCS 7819:160-172; :class:`sklearn.cluster.HDBSCAN`)
    finds the number of clusters itself. It is fitted on up to ``fit_sample`` events; each other event
    takes the cluster of its nearest fitted event when it lies within that event's core distance (the
    distance to its ``min_samples``-th neighbour, i.e. inside its dense neighbourhood) and stays
    unassigned otherwise. ``cluster_probability`` is HDBSCAN's membership strength (of the neighbour).
    """

    name: ClassVar[str] = "density"
    summary: ClassVar[str] = "HDBSCAN on event shapes; finds the number of clusters, leaves outliers unassigned"
    version: ClassVar[str] = "1"
    method: ClassVar[str] = "density"
    params: ClassVar[dict[str, Param]] = {
        **_COMMON_PARAMS,
        "min_cluster_size": Param(0, kind=int, low=0,
                                  doc="fewest events a cluster needs; 0: 1 % of the fitted events (at least 5)"),
        "min_samples": Param(0, kind=int, low=0, doc="neighbours defining a dense point; 0: min_cluster_size"),
        "fit_sample": Param(10_000, kind=int, low=0, doc="most events HDBSCAN is fitted on (0: all)"),
    }
    columns: ClassVar[dict[str, Column]] = {
        "cluster": _CLUSTER_COLUMN,
        "cluster_probability": Column("float64", "", "HDBSCAN membership strength (0 for unassigned events)"),
        "cluster_count": _COUNT_COLUMN,
    }

    def _cluster(self, emb: Embedding):
        from sklearn.cluster import HDBSCAN
        from sklearn.neighbors import NearestNeighbors

        X = emb.X
        fit_rows = _sample(X.shape[0], self.fit_sample, np.random.default_rng(self.seed))
        Xf = X[fit_rows]
        size = self.min_cluster_size or max(5, round(0.01 * Xf.shape[0]))
        size = min(max(size, 2), Xf.shape[0])
        samples = min(self.min_samples or size, Xf.shape[0])
        model = HDBSCAN(min_cluster_size=size, min_samples=samples, copy=True).fit(Xf)
        labels = np.full(X.shape[0], -1, dtype=np.int64)
        probability = np.zeros(X.shape[0])
        labels[fit_rows] = model.labels_
        probability[fit_rows] = model.probabilities_
        others = np.setdiff1d(np.arange(X.shape[0]), fit_rows, assume_unique=True)
        if others.size:
            neighbours = NearestNeighbors(n_neighbors=samples).fit(Xf)
            core = neighbours.kneighbors(Xf, n_neighbors=samples)[0][:, -1]
            distance, nearest = neighbours.kneighbors(X[others], n_neighbors=1)
            nearest, distance = nearest[:, 0], distance[:, 0]
            inside = distance <= core[nearest]
            labels[others] = np.where(inside, model.labels_[nearest], -1)
            probability[others] = np.where(inside, model.probabilities_[nearest], 0.0)
        found = int(np.unique(labels[labels >= 0]).size)
        rows = [{"method": self.method, "k": found, "criterion": "density", "score": float(np.mean(labels < 0)),
                 "better": "lower", "chosen": True}]
        return labels, {"cluster_probability": probability}, rows


#: The bundled clustering stages.
CLUSTER_STAGES: list[type] = [KMeansShapes, GaussianMixtureShapes, DensityShapes]
