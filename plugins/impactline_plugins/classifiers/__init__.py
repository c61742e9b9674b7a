"""Bundled classifier stages (run over all events of a run, after every file is measured).

Where things live
-----------------
cluster     ``kmeans`` (silhouette), ``gmm`` (BIC), ``density`` (HDBSCAN): unsupervised groups of shapes
trained     ``forest``: applies a random forest trained by ``impactline train``
"""

from .cluster import CLUSTER_STAGES
from .trained import TrainedForest

STAGES: list[type] = [*CLUSTER_STAGES, TrainedForest]
