"""Unsupervised grouping of event shapes: k-means, Gaussian mixtures chosen by BIC, density-based (HDBSCAN).

The mixture's components are by default combined into clusters by the entropy criterion of Baudry,
Raftery, Celeux, Lo & Gottardo (2010) (:func:`combine_components`, :func:`choose_combination`): BIC counts
the Gaussians a density needs, and a kind of event that is not one Gaussian takes several.

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
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
import pyarrow as pa
from impactline import Classifier, Column, Param
from impactline.shapes import EMBEDDINGS, SHAPE_TRANSFORMS, Embedding, embed, selection_table

__all__ = ["KMeansShapes", "GaussianMixtureShapes", "DensityShapes", "relabel_by_size", "SILHOUETTE_SAMPLE",
           "COMBINE_METHODS", "ELBOW_AXES", "COUNT_RULES", "Combination", "assignment_entropy", "merge_posterior",
           "combine_components", "elbow", "step_silhouettes", "choose_combination", "MINOR_RULES", "minor_clusters"]

#: Most events the silhouette criterion is computed on.
SILHOUETTE_SAMPLE = 4000
#: Ways of turning mixture components into clusters, and axes of the entropy plot.
COMBINE_METHODS: tuple[str, ...] = ("none", "entropy")
ELBOW_AXES: tuple[str, ...] = ("normalized", "standard")
#: Rules choosing the step of the merge hierarchy: the entropy plot's elbow, or the largest mean silhouette.
COUNT_RULES: tuple[str, ...] = ("elbow", "silhouette")
#: What becomes of the events of a cluster too small to count (``min_share``): unassigned, or moved.
MINOR_RULES: tuple[str, ...] = ("unassign", "reassign")

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
        from threadpoolctl import threadpool_limits

        # One BLAS thread: the matrices are thin (events x at most ~20 coordinates), so threads gain little,
        # and OpenBLAS threads spinning against a busy core cost a great deal (10,000 events: 18 s on one
        # thread, 290 s on two while another process held one of the machine's two cores).
        with threadpool_limits(limits=1, user_api="blas"):
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


# ------------------------------------------------------------------------------------------------ combining
@dataclass
class Combination:
    """Clusterings made by merging the components of a Gaussian mixture, from ``K`` clusters down to 1.

    Step ``j`` (``j = 0 ... K - 1``) holds ``K - j`` clusters; step 0 is the mixture itself.

    Attributes
    ----------
    groups : list of list of tuple of int
        ``groups[j]``: the clusters of step ``j``, each a sorted tuple of component indices (clusters in
        order of their smallest component).
    entropy : ndarray, shape (K,)
        Entropy of the soft assignment at each step, ``-sum_i sum_k t_ik ln t_ik`` in nats, summed over the
        events (``t_ik``: posterior probability of cluster ``k`` for event ``i``).
    merged_events : ndarray of int, shape (K,)
        Cumulative number of events merged: at each step, the events whose most probable cluster (before
        the merge) is one of the two clusters merged; 0 at step 0. The abscissa of the "normalized" plot.
    merged : list of tuple
        ``merged[j]`` (``j >= 1``): the two clusters of step ``j - 1`` joined at step ``j``, as tuples of
        component indices; ``merged[0]`` is ``None``.
    """

    groups: list[list[tuple[int, ...]]]
    entropy: np.ndarray
    merged_events: np.ndarray
    merged: list[tuple[tuple[int, ...], tuple[int, ...]] | None] = field(default_factory=list)

    @property
    def counts(self) -> np.ndarray:
        """Number of clusters at each step, ``K, K - 1, ..., 1``."""
        return np.array([len(g) for g in self.groups], dtype=np.int64)


def assignment_entropy(posterior: np.ndarray) -> float:
    """Entropy of a soft assignment, ``-sum_i sum_k t_ik ln t_ik`` (nats; ``0 ln 0 = 0``).

    Parameters
    ----------
    posterior : ndarray, shape (n_events, n_clusters)
        Posterior probabilities ``t_ik``; each row sums to 1.

    Returns
    -------
    float
        Total over events, in nats. This is the entropy term of Biernacki, Celeux & Govaert (2000), IEEE
        Trans. Pattern Anal. Mach. Intell. 22:719-725 (ICL), that Baudry et al. (2010) merge on.
    """
    from scipy.special import xlogy

    posterior = np.asarray(posterior, dtype=np.float64)
    return float(-np.sum(xlogy(posterior, posterior)))


def merge_posterior(posterior: np.ndarray, groups: list[tuple[int, ...]]) -> np.ndarray:
    """Posterior of combined clusters: each cluster's probability is the sum over its components.

    Parameters
    ----------
    posterior : ndarray, shape (n_events, n_components)
    groups : list of tuple of int
        Components of each combined cluster (a partition of ``range(n_components)``).

    Returns
    -------
    ndarray, shape (n_events, len(groups))
    """
    posterior = np.asarray(posterior, dtype=np.float64)
    return np.column_stack([posterior[:, list(g)].sum(axis=1) for g in groups]) if groups \
        else np.empty((posterior.shape[0], 0))


def combine_components(posterior: np.ndarray) -> Combination:
    """Merge mixture components hierarchically by the entropy criterion of Baudry et al. (2010).

    Baudry, Raftery, Celeux, Lo & Gottardo (2010), "Combining mixture components for clustering",
    J. Comput. Graph. Stat. 19(2):332-353: at each step the two clusters ``k, l`` whose union lowers the
    entropy of the soft assignment most are merged, i.e. the pair maximizing

        sum_i [(t_ik + t_il) ln(t_ik + t_il) - t_ik ln t_ik - t_il ln t_il]  (>= 0),

    and the merged cluster's posterior is ``t_ik + t_il`` (the mixture density is unchanged; only the
    grouping of its components changes). Ties go to the first pair in the order of the clusters' smallest
    components, so the result is deterministic. Only the pairs with the newly merged cluster are
    re-evaluated after a merge (the others' gains do not change): ``O(K^2 n)`` in all.

    Parameters
    ----------
    posterior : ndarray, shape (n_events, K)
        Posterior probabilities of the mixture's components for the events the mixture was fitted on.

    Returns
    -------
    Combination
    """
    from scipy.special import xlogy

    t = np.asarray(posterior, dtype=np.float64)
    if t.ndim != 2 or t.shape[1] < 1:
        raise ValueError(f"posterior must be (n_events, n_components), got shape {t.shape}")
    k = t.shape[1]
    columns = {j: t[:, j].copy() for j in range(k)}
    def share(p: np.ndarray) -> float:
        # A cluster's part of the entropy; summed posteriors may exceed 1 by a rounding error, hence the clip.
        return max(0.0, float(-np.sum(xlogy(p, p))))

    own = {j: share(columns[j]) for j in range(k)}
    members = {j: (j,) for j in range(k)}

    def gain(a: int, b: int) -> float:
        union = columns[a] + columns[b]
        return float(np.sum(xlogy(union, union))) + own[a] + own[b]

    gains = {(a, b): gain(a, b) for a in range(k) for b in range(a + 1, k)}
    groups: list[list[tuple[int, ...]]] = [[members[j] for j in range(k)]]
    merged: list[tuple[tuple[int, ...], tuple[int, ...]] | None] = [None]
    entropy, merged_events = [sum(own.values())], [0]
    while len(columns) > 1:
        # Keys stay sorted by smallest component (a merged cluster keeps the lower key): max() keeps the first.
        a, b = max(sorted(gains), key=lambda pair: gains[pair])
        keys = sorted(columns)
        best = np.asarray(keys)[np.argmax(np.column_stack([columns[j] for j in keys]), axis=1)]
        merged_events.append(merged_events[-1] + int(np.count_nonzero((best == a) | (best == b))))
        merged.append((members[a], members[b]))
        columns[a] = columns[a] + columns.pop(b)
        own[a] = share(columns[a])
        del own[b]
        members[a] = tuple(sorted(members[a] + members.pop(b)))
        gains = {pair: value for pair, value in gains.items() if b not in pair}
        for c in columns:
            if c != a:
                gains[(min(a, c), max(a, c))] = gain(min(a, c), max(a, c))
        entropy.append(sum(own.values()))
        groups.append([members[j] for j in sorted(columns)])
    return Combination(groups=groups, entropy=np.asarray(entropy),
                       merged_events=np.asarray(merged_events, dtype=np.int64), merged=merged)


def _line_rss(x: np.ndarray, y: np.ndarray) -> float:
    """Residual sum of squares of the least-squares line through ``(x, y)`` (0 for two points)."""
    design = np.column_stack([np.ones_like(x), x])
    coef = np.linalg.lstsq(design, y, rcond=None)[0]
    return float(np.sum((y - design @ coef) ** 2))


def elbow(x: np.ndarray, y: np.ndarray) -> tuple[int, np.ndarray]:
    """Change point of a two-segment piecewise-linear least-squares fit to the points ``(x, y)``.

    For each interior point ``c`` a line is fitted to points ``0 ... c`` and another to ``c ... m - 1``
    (the change point belongs to both); the ``c`` with the smallest total residual sum of squares wins
    (the first on ties). This is the automatic choice of Baudry et al. (2010), sec. on choosing the
    number of clusters (two-part piecewise linear regression on the entropy plot; the exact form of the
    fit is from memory: two separate least-squares lines sharing the change point).

    Parameters
    ----------
    x, y : ndarray, shape (m,)
        Abscissae and ordinates in step order; ``m >= 3``.

    Returns
    -------
    index : int
        The change point, ``1 <= index <= m - 2``.
    rss : ndarray, shape (m,)
        Total residual sum of squares for each candidate (NaN at both ends).
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    if x.shape != y.shape or x.ndim != 1 or x.size < 3:
        raise ValueError(f"the elbow fit needs at least 3 points (x and y of equal length), got {x.shape}, {y.shape}")
    rss = np.full(x.size, math.nan)
    for c in range(1, x.size - 1):
        rss[c] = _line_rss(x[:c + 1], y[:c + 1]) + _line_rss(x[c:], y[c:])
    return int(np.nanargmin(rss)), rss


def step_silhouettes(X: np.ndarray, posterior: np.ndarray, combination: Combination, seed: int = 0,
                     sample: int = SILHOUETTE_SAMPLE) -> np.ndarray:
    """Mean silhouette width of each step of a merge hierarchy (Rousseeuw 1987).

    Rousseeuw (1987), "Silhouettes: a graphical aid to the interpretation and validation of cluster
    analysis", J. Comput. Appl. Math. 20:53-65: per point ``s = (b - a) / max(a, b)``, ``a`` the mean
    Euclidean distance to the other points of its cluster, ``b`` the smallest mean distance to the points of
    another cluster; the mean over points is highest for compact, well-separated clusters (his
    "silhouette coefficient" is its largest value over the numbers of clusters). Each step's events go to
    their most probable combined cluster. The silhouette costs the square of the number of points, so it is
    computed on at most ``sample`` rows drawn with ``seed`` (the same rows for every step).

    Parameters
    ----------
    X : ndarray, shape (n_events, n_dims)
        Embedded events.
    posterior : ndarray, shape (n_events, K)
        Posterior probabilities of the mixture's components for the same events (the combination's
        component numbering).
    combination : Combination
    seed : int
        Seed of the subsample.
    sample : int
        Most events used (0: all).

    Returns
    -------
    ndarray, shape (K,)
        Mean silhouette of each step, -1 to 1; NaN where the step leaves fewer than 2 clusters (or as many
        clusters as sampled events) among the sampled events.
    """
    rows = _sample(X.shape[0], sample, np.random.default_rng(seed))
    Xs, ts = np.asarray(X)[rows], np.asarray(posterior)[rows]
    return np.array([_silhouette(Xs, np.argmax(merge_posterior(ts, groups), axis=1), seed)
                     for groups in combination.groups])


def choose_combination(combination: Combination, axis: str = "normalized", min_gain: float = 0.0,
                       clusters: int = 0, silhouette: np.ndarray | None = None) -> tuple[int, np.ndarray, str]:
    """Which step of a :class:`Combination` to keep.

    Parameters
    ----------
    combination : Combination
    axis : {"normalized", "standard"}
        Abscissa of the entropy plot the elbow is fitted on: the cumulative number of merged events
        ("normalized", the rescaled plot Baudry et al. 2010 recommend in their abstract) or the number of
        clusters ("standard").
    min_gain : float
        Least mean entropy decrease per merged event, in nats, over the merges before the elbow for them to
        count as joining parts of one cluster. Not from the paper: with well-separated components every
        merge costs almost nothing, the entropy plot is flat, and the elbow of a flat plot is arbitrary; this
        keeps the mixture's components then. 0 disables the check.
    clusters : int
        Number of clusters wanted; 0 chooses it (elbow, or silhouette when given). Larger than the number of
        components: all kept.
    silhouette : ndarray, shape (K,), optional
        Mean silhouette of each step (:func:`step_silhouettes`). When given, the step with the largest one
        among those with at least 2 clusters is kept instead of the elbow (the first, i.e. the one with more
        clusters, on ties); ``axis`` and ``min_gain`` are then not used.

    Returns
    -------
    step : int
        Number of merges (index into ``combination.groups``).
    rss : ndarray, shape (K,)
        Elbow fit residual sum of squares per step (NaN where not a candidate or not fitted).
    reason : str
        ``elbow``, ``flat`` (elbow rejected by ``min_gain``), ``few`` (fewer than 3 steps: no elbow can be
        fitted, or no step with a silhouette; the components are kept), ``silhouette`` or ``fixed``.
    """
    k = combination.entropy.size
    rss = np.full(k, math.nan)
    if clusters:
        return k - min(clusters, k), rss, "fixed"
    if silhouette is not None:
        silhouette = np.asarray(silhouette, dtype=np.float64)
        if silhouette.shape != (k,):
            raise ValueError(f"silhouette must hold one value per step ({k}), got shape {silhouette.shape}")
        candidates = np.flatnonzero((combination.counts >= 2) & np.isfinite(silhouette))
        if not candidates.size:
            return 0, rss, "few"
        return int(candidates[np.argmax(silhouette[candidates])]), rss, "silhouette"
    if k < 3:
        return 0, rss, "few"
    if axis == "normalized":
        x = combination.merged_events.astype(np.float64)
    elif axis == "standard":
        x = combination.counts.astype(np.float64)
    else:
        raise ValueError(f"axis must be 'normalized' or 'standard', got {axis!r}")
    step, rss = elbow(x, combination.entropy)
    drop = combination.entropy[0] - combination.entropy[step]
    per_event = drop / max(int(combination.merged_events[step]), 1)
    if per_event < min_gain:
        return 0, rss, "flat"
    return step, rss, "elbow"


def minor_clusters(labels: np.ndarray, n_clusters: int, min_share: float) -> np.ndarray:
    """Clusters holding fewer than ``min_share`` of the events (the largest cluster never counts as minor).

    Parameters
    ----------
    labels : ndarray of int, shape (n_events,)
        Cluster of each event, ``0 ... n_clusters - 1``.
    n_clusters : int
    min_share : float
        Least fraction of the events a cluster must hold, 0 to 1; 0 makes no cluster minor.

    Returns
    -------
    ndarray of bool, shape (n_clusters,)
        True for the minor clusters.
    """
    counts = np.bincount(np.asarray(labels, dtype=np.int64), minlength=n_clusters)[:n_clusters]
    minor = counts < min_share * max(int(counts.sum()), 1)
    if minor.all():
        minor[int(np.argmax(counts))] = False
    return minor


class GaussianMixtureShapes(_ShapeClusterer):
    """Gaussian mixture on the embedded shapes; components by BIC, optionally combined into clusters.

    With ``k = 0`` mixtures of 1 to ``max_k`` full-covariance components are fitted by EM
    (:class:`sklearn.mixture.GaussianMixture`) and the one with the lowest Bayesian information
    criterion, BIC = -2 ln L + p ln n, is kept (Schwarz 1978, Annals of Statistics 6:461-464).

    BIC counts the components needed to describe the density, and a class whose points do not form one
    Gaussian takes several. With ``combine = "entropy"`` the components are then merged hierarchically,
    each time the pair whose union lowers the entropy of the posterior assignment most, and the number of
    clusters is the elbow of the entropy plot (Baudry, Raftery, Celeux, Lo & Gottardo 2010, J. Comput.
    Graph. Stat. 19:332-353; :func:`combine_components`, :func:`choose_combination`). A combined cluster's
    posterior is the sum of its components' posteriors. With ``count_rule = "silhouette"`` the step of the
    merge hierarchy with the largest mean silhouette (Rousseeuw 1987; :func:`step_silhouettes`, on up to
    4000 of the fitted events) is kept instead; on the simulator's recordings it merges too far
    (docs/shapes.md), so the elbow stays the default.

    A cluster holding fewer than ``min_share`` of the events (2 % by default) is *minor*: too small to
    count as a kind of event (on the simulator's recordings such clusters hold 0.3-3 % of the events, about
    half of them more than one collision each; docs/shapes.md). With ``minor = "unassign"`` its events
    are left unassigned (``cluster = -1``, as a density method leaves noise); with ``"reassign"`` each goes
    to the most probable of the other clusters (posteriors renormalized over them). Either way
    ``cluster_count`` counts only the others, and the selection table gets a ``criterion = "min_share"``
    row (``score``: share of events in minor clusters; ``groups``: the minor clusters' components).

    Each event goes to its most probable cluster; ``cluster_probability`` is that posterior probability
    and ``cluster_component`` its most probable mixture component (numbered by size, like clusters).
    After :meth:`fit_predict`, ``mixture_`` is the fitted :class:`~sklearn.mixture.GaussianMixture`,
    ``component_order_`` the mixture's component of each component number (``posterior[:, order]``) and
    ``combination_`` the :class:`Combination` (None without ``combine``).
    """

    name: ClassVar[str] = "gmm"
    summary: ClassVar[str] = "Gaussian mixture on event shapes; components by BIC, optionally combined by entropy"
    version: ClassVar[str] = "3"  # 3: clusters under min_share (2 %) dissolved
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
        "combine": Param("entropy", kind=str, choices=COMBINE_METHODS,
                         doc="merge components into clusters by the entropy criterion (Baudry et al. 2010), "
                             "or keep one cluster per component"),
        "elbow": Param("normalized", kind=str, choices=ELBOW_AXES,
                       doc="entropy plot the elbow is found on: against merged events (normalized) or clusters"),
        "min_gain": Param(0.01, low=0,
                          doc="least mean entropy decrease per merged event before the elbow, in nats "
                              "(0.01: about 1.4 % of them split 50:50); below it the components are kept"),
        "clusters": Param(0, kind=int, low=0, high=100,
                          doc="with combine: number of clusters to merge into; 0 chooses it by count_rule"),
        "count_rule": Param("elbow", kind=str, choices=COUNT_RULES,
                            doc="with combine: step of the merge hierarchy kept, the elbow of the entropy plot "
                                "or the largest mean silhouette (Rousseeuw 1987)"),
        "min_share": Param(0.02, low=0, high=0.5,
                           doc="least share of the events a cluster needs to count; smaller (minor) clusters "
                               "are dissolved as 'minor' says; 0 keeps them all"),
        "minor": Param("unassign", kind=str, choices=MINOR_RULES,
                       doc="events of minor clusters: left unassigned (-1) or moved to their most probable "
                           "other cluster"),
    }
    columns: ClassVar[dict[str, Column]] = {
        "cluster": _CLUSTER_COLUMN,
        "cluster_probability": Column("float64", "", "posterior probability of the assigned cluster"),
        "cluster_component": Column("int64", "", "most probable mixture component, 0 = largest (before combining)"),
        "cluster_count": _COUNT_COLUMN,
        "cluster_bic": Column("float64", "", "BIC of the mixture kept, on the fitted events (same on every row)"),
    }
    combination_: Combination | None = None
    mixture_: Any = None
    component_order_: np.ndarray | None = None

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
        # Components renumbered by size (0 = most events), so that cluster_component and the groups in the
        # selection table use the same numbers.
        posterior = model.predict_proba(X)
        order = _size_order(np.argmax(posterior, axis=1), k)
        posterior = posterior[:, order]
        self.mixture_, self.component_order_ = model, order
        component = np.argmax(posterior, axis=1)
        self.combination_ = None
        if self.combine == "entropy":
            combination = combine_components(posterior[fit_rows])
            silhouette = None
            if self.count_rule == "silhouette" and not self.clusters:
                silhouette = step_silhouettes(Xf, posterior[fit_rows], combination, self.seed)
            step, rss, reason = choose_combination(combination, self.elbow, self.min_gain, self.clusters,
                                                   silhouette)
            self.combination_ = combination
            rows += _combination_rows(self.method, combination, step, rss, reason, silhouette)
            groups = combination.groups[step]
            posterior = merge_posterior(posterior, groups)
        else:
            groups = [(j,) for j in range(k)]
        labels = np.argmax(posterior, axis=1)
        probability = posterior[np.arange(X.shape[0]), labels]
        if self.min_share > 0:
            minor = minor_clusters(labels, len(groups), self.min_share)
            in_minor = minor[labels]
            if self.minor == "reassign" and in_minor.any():
                kept = posterior[in_minor][:, ~minor]
                total = kept.sum(axis=1, keepdims=True)
                # An event with no posterior mass left on the kept clusters goes to the most probable of them
                # by the unnormalized posterior (all zeros: the first), rather than dividing by zero.
                kept = np.divide(kept, total, out=np.zeros_like(kept), where=total > 0)
                choice = np.argmax(kept, axis=1)
                labels[in_minor] = np.flatnonzero(~minor)[choice]
                probability[in_minor] = kept[np.arange(choice.size), choice]
            elif in_minor.any():
                labels[in_minor] = -1
                probability[in_minor] = math.nan
            rows.append({"method": self.method, "k": int(np.count_nonzero(~minor)), "criterion": "min_share",
                         "score": float(np.mean(in_minor)), "better": "lower", "chosen": True,
                         "decision": self.minor,
                         "groups": " ".join(_group_text(g) for g, m in zip(groups, minor, strict=True) if m)})
        return labels, {"cluster_probability": probability,
                        "cluster_component": component, "cluster_bic": np.full(X.shape[0], bic)}, rows


def _combination_rows(method: str, combination: Combination, step: int, rss: np.ndarray,
                      reason: str, silhouette: np.ndarray | None = None) -> list[dict[str, Any]]:
    """Selection-table rows of a combination: one per number of clusters, from the mixture's down to 1."""
    rows = []
    for j, groups in enumerate(combination.groups):
        pair = combination.merged[j]
        rows.append({"method": method, "k": len(groups), "criterion": "entropy", "decision": reason,
                     "score": float(combination.entropy[j]), "better": "elbow", "chosen": j == step,
                     "merged_events": int(combination.merged_events[j]),
                     "elbow_rss": None if math.isnan(rss[j]) else float(rss[j]),
                     "silhouette": None if silhouette is None or math.isnan(silhouette[j]) else float(silhouette[j]),
                     "merge": None if pair is None else "+".join(_group_text(g) for g in pair),
                     "groups": " ".join(_group_text(g) for g in groups)})
    return rows


def _size_order(labels: np.ndarray, k: int) -> np.ndarray:
    """Component indices by decreasing number of events (ties: first appearance first; empty ones last)."""
    counts = np.bincount(labels, minlength=k)
    first = np.full(k, labels.size)
    seen, where = np.unique(labels, return_index=True)
    first[seen] = where
    return np.lexsort((np.arange(k), first, -counts))


def _group_text(group: tuple[int, ...]) -> str:
    return "{" + ",".join(str(c) for c in group) + "}"


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
