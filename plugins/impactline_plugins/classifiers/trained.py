"""Apply a classifier trained with ``impactline train`` (a random forest saved as plain arrays)."""

from __future__ import annotations

from pathlib import Path
from typing import ClassVar

import numpy as np
import pyarrow as pa
from impactline import Classifier, Column, ImpactlineError, Param
from impactline.shapes import ForestModel

__all__ = ["TrainedForest"]


class TrainedForest(Classifier):
    """Labels every event with a random forest trained on hand-labelled events (``impactline train``).

    The model file holds the trees as arrays (``.npz``, read without pickle) and the description of its
    inputs (shape points and scalar features); the pipeline must provide the same ``shape`` column and
    features the model was trained on. Events without a usable shape get an empty label. A relative
    ``model`` path is taken from the current folder.
    """

    name: ClassVar[str] = "forest"
    summary: ClassVar[str] = "labels events with a random forest trained by 'impactline train'"
    version: ClassVar[str] = "1"
    params: ClassVar[dict[str, Param]] = {
        "model": Param(None, kind=str, doc="model file written by 'impactline train' (.npz)"),
    }
    columns: ClassVar[dict[str, Column]] = {
        "label": Column("string", "", "most probable class (null: the event has no usable shape)"),
        "label_probability": Column("float64", "", "share of the trees' votes for that class"),
    }

    def fit_predict(self, events: pa.Table) -> dict[str, np.ndarray]:
        """Predict a label for every event (nothing is fitted: the model was trained beforehand).

        Parameters
        ----------
        events : pyarrow.Table
            The run's events.

        Returns
        -------
        dict of ndarray
            ``label`` (object array of str or None) and ``label_probability`` (NaN where unlabelled).
        """
        if not self.model:
            raise ImpactlineError("classifier 'forest' needs its model file: [classifier] use = \"forest\", "
                                  "model = \"MODEL.npz\" (written by 'impactline train')")
        # Loaded once per stage: `impactline classify` applies one stage to run after run.
        if getattr(self, "_loaded", None) is None:
            self._loaded = ForestModel.load(Path(self.model))
        return apply_model(self._loaded, events)


def apply_model(model: ForestModel, events: pa.Table) -> dict[str, np.ndarray]:
    """Labels and probabilities of ``events`` from ``model`` (None / NaN for rows it cannot label)."""
    X, valid = model.inputs(events)
    labels = np.full(events.num_rows, None, dtype=object)
    probability = np.full(events.num_rows, np.nan)
    if valid.any():
        proba = model.predict_proba(X[valid])
        best = np.argmax(proba, axis=1)
        labels[valid] = np.asarray(model.classes, dtype=object)[best]
        probability[valid] = proba[np.arange(best.size), best]
    return {"label": labels, "label_probability": probability}
