"""``impactline cluster``, ``train`` and ``classify``: event shapes across one or more run folders.

cluster RUN... [--method gmm|kmeans|density] [--k auto|N] [--combine none|entropy] [--seed N]
    Clusters the events of all the runs together (one set of cluster numbers across runs) with a
    registered clustering stage, and writes into each run folder ``clusters.parquet`` (per event),
    ``cluster_prototypes.parquet``, ``cluster_sizes.parquet`` and ``cluster_selection.parquet``. With
    ``gmm``, ``--combine entropy`` merges the BIC mixture's components into clusters by the entropy
    criterion of Baudry et al. (2010); the entropy of each step and the count chosen go to the selection
    table. ``--count-rule silhouette`` keeps the step with the largest mean silhouette (Rousseeuw 1987)
    instead of the elbow of the entropy plot, and records each step's silhouette. Clusters holding fewer
    than ``--min-share`` of the events (gmm, default 2 %) do not count; their events are left unassigned
    or, with ``--minor reassign``, moved to their most probable other cluster.
train RUN... --labels FILE --out MODEL
    Trains a random forest on hand-labelled events (CSV or Parquet: file, event_id, label), prints the
    cross-validated accuracy and confusion matrix, and saves the model as plain arrays (no pickle).
classify RUN... --model MODEL
    Applies a trained model (through the ``forest`` stage) and writes ``classes.parquet`` into each run.

Results join the events on ``(file, event_id)``: :func:`impactline.shapes.read_events_with`.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from . import __version__
from .cli import EXIT_OK
from .errors import ImpactlineError
from .output import CONTRACT_COLUMNS, schema_for
from .shapes import (
    CLASSES_TABLE,
    CLUSTERS_TABLE,
    DEFAULT_FEATURES,
    EMBEDDINGS,
    PROTOTYPES_TABLE,
    SELECTION_TABLE,
    SHAPE_COLUMN,
    SHAPE_TRANSFORMS,
    SIZES_TABLE,
    ForestModel,
    cluster_sizes,
    load_run_events,
    match_labels,
    model_inputs,
    prototypes,
    read_label_file,
    write_sidecar,
)

__all__ = ["register_cli", "cmd_cluster", "cmd_train", "cmd_classify", "cluster_runs", "train_model"]

_READ_COLUMNS = (SHAPE_COLUMN, *DEFAULT_FEATURES)


def register_cli(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``cluster``, ``train`` and ``classify`` sub-commands."""
    p = subparsers.add_parser("cluster", help="cluster event shapes across run folders",
                              description="Cluster the events of one or more run folders together; results go "
                                          "back into each folder as sidecar tables joined on (file, event_id).")
    p.add_argument("runs", nargs="+", metavar="RUN_FOLDER")
    p.add_argument("--method", default="gmm",
                   help="clustering stage: gmm (BIC; default: best on simulated shapes), kmeans (silhouette), "
                        "density (HDBSCAN) or another installed classifier with a 'cluster' column")
    p.add_argument("--k", default="auto",
                   help="number of clusters (gmm: mixture components), or 'auto' (default) to choose it")
    p.add_argument("--max-k", type=int, default=None, help="largest count tried with --k auto (default 10)")
    p.add_argument("--embedding", choices=EMBEDDINGS, default="pca+features",
                   help="coordinates to cluster (default pca+features)")
    p.add_argument("--transform", choices=SHAPE_TRANSFORMS, default="asinh",
                   help="shapes through asinh (default) or as they are")
    p.add_argument("--components", type=int, default=0,
                   help="PCA components / wavelet coefficients; 0: enough for 95 %% of the variance")
    p.add_argument("--features", default="", help="comma-separated scalar columns for the features embeddings")
    p.add_argument("--combine", choices=("none", "entropy"), default=None,
                   help="gmm: merge mixture components into clusters by the entropy criterion (Baudry et al. "
                        "2010; the stage's default), or keep one cluster per component (none)")
    p.add_argument("--elbow", choices=("normalized", "standard"), default=None,
                   help="gmm with --combine entropy: find the elbow of entropy against the cumulative number of "
                        "merged events (normalized, default) or against the number of clusters (standard)")
    p.add_argument("--clusters", type=int, default=None,
                   help="gmm with --combine entropy: merge down to this many clusters instead of the elbow's")
    p.add_argument("--count-rule", choices=("elbow", "silhouette"), default=None,
                   help="gmm with --combine entropy: keep the step at the elbow of the entropy plot (default) or "
                        "the one with the largest mean silhouette (Rousseeuw 1987)")
    p.add_argument("--min-share", type=float, default=None,
                   help="gmm: least share of the events a cluster needs to count (default 0.02; 0 keeps all)")
    p.add_argument("--minor", choices=("unassign", "reassign"), default=None,
                   help="gmm: events of clusters under --min-share are left unassigned (default) or moved to their "
                        "most probable other cluster")
    p.add_argument("--min-cluster-size", type=int, default=None, help="density method: fewest events per cluster")
    p.add_argument("--seed", type=int, default=0, help="seed of every random choice (default 0)")
    p.add_argument("--quiet", action="store_true", help="no progress output")
    p.set_defaults(func=cmd_cluster)

    p = subparsers.add_parser("train", help="train a shape classifier on hand-labelled events",
                              description="Train a random forest on labelled events (file, event_id, label) "
                                          "and save it as plain arrays (.npz, no pickle).")
    p.add_argument("runs", nargs="+", metavar="RUN_FOLDER")
    p.add_argument("--labels", required=True, help="CSV or Parquet with columns file, event_id, label")
    p.add_argument("--out", required=True, help="model file to write (.npz)")
    p.add_argument("--features", default=None,
                   help=f"comma-separated scalar columns (default: those of {', '.join(DEFAULT_FEATURES)} present; "
                        "'' for none)")
    p.add_argument("--no-shape", action="store_true", help="train on scalar features only")
    p.add_argument("--trees", type=int, default=200, help="trees in the forest (default 200)")
    p.add_argument("--folds", type=int, default=5, help="cross-validation folds (default 5)")
    p.add_argument("--seed", type=int, default=0, help="seed (default 0)")
    p.set_defaults(func=cmd_train)

    p = subparsers.add_parser("classify", help="label events with a trained model",
                              description="Apply a model from 'impactline train'; writes classes.parquet "
                                          "into each run folder.")
    p.add_argument("runs", nargs="+", metavar="RUN_FOLDER")
    p.add_argument("--model", required=True, help="model file written by 'impactline train'")
    p.set_defaults(func=cmd_classify)


def _say(args: argparse.Namespace, text: str) -> None:
    if not getattr(args, "quiet", False):
        print(text, file=sys.stderr, flush=True)


def _split(text: str | None) -> list[str]:
    return [t.strip() for t in (text or "").split(",") if t.strip()]


def _check_runs(runs: list[str]) -> list[Path]:
    paths = [Path(r) for r in runs]
    for path in paths:
        if not path.is_dir():
            raise ImpactlineError(f"{path}: not a folder; give run folders made by 'impactline run ... --out RUN'")
    return paths


def _table(columns, data: dict[str, Any], metadata: dict[str, str]) -> pa.Table:
    schema = schema_for(columns, metadata)
    return pa.Table.from_arrays([pa.array(data[name], type=schema.field(name).type) for name in columns],
                                schema=schema)


# ------------------------------------------------------------------------------------------------ cluster
def cluster_runs(runs: list[str | Path], method: str = "kmeans", params: dict[str, Any] | None = None,
                 registry=None) -> dict[str, Any]:
    """Cluster the events of ``runs`` together and write the sidecar tables into each run folder.

    Parameters
    ----------
    runs : list of path-like
        Run folders.
    method : str
        A registered classifier stage with a ``cluster`` column (``kmeans``, ``gmm``, ``density``).
    params : dict, optional
        Its parameters (as in a pipeline file).
    registry : PluginRegistry, optional
        Default: the installed plugins.

    Returns
    -------
    dict
        ``events`` (the table clustered, with the stage's columns appended), ``stage``, ``prototypes``,
        ``selection``, ``written`` (paths).
    """
    from .registry import default_registry

    registry = registry or default_registry()
    try:
        entry = registry.get("classifier", method)
    except KeyError as exc:
        raise ImpactlineError(str(exc.args[0])) from None
    if "cluster" not in entry.cls.columns:
        raise ImpactlineError(f"classifier {method!r} does not produce clusters (no 'cluster' column); "
                              "use kmeans, gmm or density")
    stage = entry.cls(**(params or {}))
    extra = list(getattr(stage, "features", None) or [])
    events = load_run_events(runs, columns=[*_READ_COLUMNS, *extra])
    if events.num_rows == 0:
        raise ImpactlineError(f"no events in {', '.join(map(str, runs))}; nothing to cluster")
    columns = stage.fit_predict(events)
    stamp = {"impactline.version": __version__, "impactline.classifier": method,
             "impactline.params": json.dumps(stage.get_params(), sort_keys=True),
             "impactline.embedding": json.dumps(getattr(stage, "embedding_", None) or {}, default=str),
             "impactline.runs": json.dumps([str(r) for r in runs]),
             "impactline.created": datetime.now(UTC).isoformat()}
    labels = np.asarray(columns["cluster"], dtype=np.int64)
    proto = prototypes(events, labels)
    selection = getattr(stage, "selection_", None)
    run_of = events.column("run").to_numpy(zero_copy_only=False).astype(str)
    written = []
    per_event = {"file": CONTRACT_COLUMNS["file"], "event_id": CONTRACT_COLUMNS["event_id"], **stage.columns}
    for run in runs:
        mask = run_of == str(run)
        rows = events.filter(pa.array(mask))
        data = {"file": rows.column("file"), "event_id": rows.column("event_id"),
                **{name: np.asarray(columns[name])[mask] for name in stage.columns}}
        written.append(write_sidecar(_table(per_event, data, stamp), run, CLUSTERS_TABLE))
        written.append(write_sidecar(proto, run, PROTOTYPES_TABLE, stamp))
        written.append(write_sidecar(cluster_sizes(rows, labels[mask]), run, SIZES_TABLE, stamp))
        if selection is not None:
            written.append(write_sidecar(selection, run, SELECTION_TABLE, stamp))
    for name in stage.columns:
        events = events.append_column(name, pa.array(np.asarray(columns[name])))
    return {"events": events, "stage": stage, "prototypes": proto, "selection": selection, "written": written}


#: Options of the gmm method's combination of mixture components.
_COMBINE_OPTIONS = ("combine", "elbow", "clusters", "count_rule")
#: Options only some methods declare (density: the smallest cluster; gmm: clusters too small to count).
_METHOD_OPTIONS = ("min_cluster_size", "min_share", "minor")


def _cluster_params(args: argparse.Namespace, declared: dict) -> dict[str, Any]:
    params: dict[str, Any] = {"seed": args.seed, "embedding": args.embedding, "components": args.components,
                              "transform": args.transform}
    if _split(args.features):
        params["features"] = _split(args.features)
    k = str(args.k).strip().lower()
    if k != "auto":
        try:
            params["k"] = int(k)
        except ValueError:
            raise ImpactlineError(f"--k expects 'auto' or a whole number of clusters, got {args.k!r}") from None
    if args.max_k is not None:
        params["max_k"] = args.max_k
    for key in (*_METHOD_OPTIONS, *_COMBINE_OPTIONS):
        if getattr(args, key, None) is not None:
            params[key] = getattr(args, key)
    for key in list(params):
        if key not in declared:
            if key in ("k", "max_k", *_METHOD_OPTIONS, *_COMBINE_OPTIONS):
                raise ImpactlineError(f"--{key.replace('_', '-')} does not apply to --method {args.method}")
            params.pop(key)
    combine = params.get("combine", declared["combine"].default if "combine" in declared else None)
    if ("elbow" in params or "clusters" in params or "count_rule" in params) and combine != "entropy":
        raise ImpactlineError("--elbow, --clusters and --count-rule say how mixture components are combined into "
                              "clusters; add --combine entropy")
    return params


def cmd_cluster(args: argparse.Namespace) -> int:
    """Handler of ``impactline cluster``."""
    from .registry import default_registry

    runs = _check_runs(args.runs)
    registry = default_registry()
    try:
        declared = registry.get("classifier", args.method).cls.params
    except KeyError as exc:
        raise ImpactlineError(str(exc.args[0])) from None
    params = _cluster_params(args, declared)
    started = time.perf_counter()
    _say(args, f"clustering the events of {len(runs)} run folder(s) with {args.method} ...")
    result = cluster_runs(runs, args.method, params, registry)
    seconds = time.perf_counter() - started
    print(summarize_clusters(result, seconds))
    return EXIT_OK


def summarize_clusters(result: dict[str, Any], seconds: float) -> str:
    """A readable report of a clustering: embedding, criterion per candidate count, clusters."""
    events, stage, proto = result["events"], result["stage"], result["prototypes"]
    info = getattr(stage, "embedding_", None) or {}
    labels = np.asarray(events.column("cluster").to_numpy(zero_copy_only=False), dtype=np.int64)
    lines = [f"{stage.name}: {events.num_rows} events from {len(set(events.column('run').to_pylist()))} run(s), "
             f"{info.get('usable', events.num_rows)} with a usable shape"]
    if info:
        detail = f"embedding {info.get('method')}"
        if "components" in info:
            detail += f", {info['components']} components ({100 * info.get('variance_kept', 0):.1f} % of variance)"
        if info.get("features"):
            detail += f", features {', '.join(info['features'])}"
        if info.get("features_dropped"):
            detail += " (left out: " + ", ".join(f"{k} {v}" for k, v in info["features_dropped"].items()) + ")"
        lines.append(detail)
    selection = result.get("selection")
    if selection is not None and selection.num_rows:
        rows = selection.to_pylist()
        for criterion in dict.fromkeys(row["criterion"] for row in rows):
            group = [row for row in rows if row["criterion"] == criterion]
            if criterion == "entropy":
                lines.append(_combination_report(group))
                continue
            if criterion == "min_share":
                row = group[0]
                fate = ("left unassigned" if row["decision"] == "unassign"
                        else "moved to their most probable other cluster")
                threshold = getattr(stage, "min_share", None)
                under = f"under {100 * threshold:g} % of the events" if threshold is not None else "too small"
                lines.append(f"clusters {under}: " + (f"{row['groups']} (as mixture components), "
                                                      f"{100 * row['score']:.1f} % of the events, {fate}"
                                                      if row["groups"] else "none")
                             + f"; {row['k']} clusters counted")
                continue
            lines.append(f"number of clusters by {criterion} ({group[0]['better']} is better):")
            for row in group:
                mark = "  <- chosen" if row["chosen"] else ""
                lines.append(f"  k = {row['k']:3d}  {criterion} = {row['score']:.6g}{mark}")
    lines.append("cluster   events  share   median duration   median peak")
    for row in proto.to_pylist():
        from .units import format_quantity

        duration = row.get("median_duration_s")
        peak = row.get("median_peak_A")
        lines.append(f"{row['cluster']:7d}  {row['n_events']:7d}  {100 * row['fraction']:5.1f} %  "
                     f"{format_quantity(duration, 's') if duration is not None else 'n/a':>15s}  "
                     f"{format_quantity(peak, 'A') if peak is not None else 'n/a':>12s}")
    lines.append(f"unassigned: {int(np.sum(labels < 0))}; time: {seconds:.2f} s")
    lines.append("written: " + ", ".join(sorted({p.name for p in result["written"]})) + " in each run folder")
    return "\n".join(lines)


_DECISIONS = {"elbow": "elbow of the entropy plot", "flat": "no merge: the entropy plot is flat (components "
                                                             "barely overlap; see min_gain)",
              "few": "no merge: too few components for an elbow", "fixed": "count given (--clusters)",
              "silhouette": "largest mean silhouette (Rousseeuw 1987)"}


def _combination_report(rows: list[dict[str, Any]]) -> str:
    """Lines of the summary for the combination of mixture components (selection rows with entropy)."""
    decision = rows[0].get("decision") or ""
    with_silhouette = any(row.get("silhouette") is not None for row in rows)
    lines = [f"components combined by entropy (Baudry et al. 2010); {_DECISIONS.get(decision, decision)}:",
             "  clusters  entropy (nats)  merged events" + ("  silhouette" if with_silhouette else "") + "  merge"]
    for row in rows:
        mark = "  <- chosen" if row["chosen"] else ""
        silhouette = ""
        if with_silhouette:
            value = row.get("silhouette")
            silhouette = f"  {value:10.3f}" if value is not None else f"  {'-':>10s}"
        lines.append(f"  {row['k']:8d}  {row['score']:14.4g}  {row['merged_events']:13d}{silhouette}  "
                     f"{row['merge'] or '-'}{mark}")
    return "\n".join(lines)


# ------------------------------------------------------------------------------------------------ train
def train_model(runs: list[str | Path], labels_path: str | Path, *, features: list[str] | None = None,
                use_shape: bool = True, trees: int = 200, folds: int = 5, seed: int = 0) -> tuple[ForestModel, dict]:
    """Train a random forest on hand-labelled events; cross-validate it first.

    Parameters
    ----------
    runs : list of path-like
        Run folders holding the labelled events.
    labels_path : path-like
        CSV or Parquet with ``file``, ``event_id``, ``label`` (:func:`impactline.shapes.read_label_file`).
    features : list of str, optional
        Scalar columns; None for the default ones present, ``[]`` for none.
    use_shape : bool
        Use the ``shape`` points as inputs (when the events have them).
    trees, folds, seed : int
        Forest size, stratified cross-validation folds, seed.

    Returns
    -------
    model : ForestModel
        Fitted on all labelled events.
    report : dict
        ``accuracy`` (mean over folds), ``fold_accuracy``, ``confusion`` (rows: true, columns: predicted,
        summed over the held-out folds), ``classes``, ``counts``, ``unmatched``, ``n_labelled``.
    """
    from sklearn import __version__ as sklearn_version
    from sklearn.ensemble import RandomForestClassifier
    from sklearn.metrics import confusion_matrix
    from sklearn.model_selection import StratifiedKFold

    events = load_run_events(runs, columns=[*_READ_COLUMNS, *(features or [])])
    hand = read_label_file(labels_path)
    rows, names, unmatched = match_labels(events, hand)
    if rows.size == 0:
        raise ImpactlineError(f"{labels_path}: none of its {hand.num_rows} labels matches an event of the runs "
                              "(by file and event_id); check the file paths and event numbers")
    use_shape = use_shape and SHAPE_COLUMN in events.column_names
    feature_names = [c for c in DEFAULT_FEATURES if c in events.column_names] if features is None else features
    X, valid, input_names, medians = model_inputs(events.take(pa.array(rows)), use_shape, feature_names)
    X, y = X[valid], names[valid]
    if not input_names:
        raise ImpactlineError("nothing to train on: the events have no shape column and no feature was chosen")
    classes, counts = np.unique(y, return_counts=True)
    if classes.size < 2:
        raise ImpactlineError(f"{labels_path}: the labelled events hold one class only ({classes.tolist()}); "
                              "label events of at least two classes")
    n_folds = int(min(folds, counts.min()))
    if n_folds < 2:
        rare = classes[counts < 2].tolist()
        raise ImpactlineError(f"classes {rare} have a single labelled event; cross-validation needs at least "
                              "two per class: label more events of them or leave them out")

    def forest() -> RandomForestClassifier:
        return RandomForestClassifier(n_estimators=trees, random_state=seed, n_jobs=1)

    confusion = np.zeros((classes.size, classes.size), dtype=np.int64)
    fold_accuracy = []
    for train, test in StratifiedKFold(n_splits=n_folds, shuffle=True, random_state=seed).split(X, y):
        predicted = forest().fit(X[train], y[train]).predict(X[test])
        confusion += confusion_matrix(y[test], predicted, labels=classes)
        fold_accuracy.append(float(np.mean(predicted == y[test])))
    fitted = forest().fit(X, y)
    report = {"accuracy": float(np.mean(fold_accuracy)), "fold_accuracy": fold_accuracy,
              "confusion": confusion.tolist(), "classes": classes.tolist(), "counts": counts.tolist(),
              "unmatched": int(unmatched), "n_labelled": int(y.size), "folds": n_folds}
    meta = {**report, "trees": trees, "seed": seed, "runs": [str(r) for r in runs], "labels": str(labels_path),
            "sklearn": sklearn_version, "impactline": __version__, "created": datetime.now(UTC).isoformat()}
    model = ForestModel.from_sklearn(fitted, fitted.classes_, input_names, use_shape, feature_names, medians, meta)
    if not np.array_equal(model.predict(X), fitted.predict(X)):  # the exported trees must be the trained ones
        raise ImpactlineError("internal error: the exported forest does not reproduce scikit-learn's predictions")
    return model, report


def format_confusion(classes: list[str], confusion: list[list[int]]) -> str:
    """The confusion matrix as text: rows are true classes, columns predicted."""
    width = max(8, *(len(c) for c in classes)) + 2
    lines = ["true \\ predicted".ljust(width) + "".join(c.rjust(width) for c in classes)]
    for name, row in zip(classes, confusion, strict=True):
        lines.append(name.ljust(width) + "".join(str(v).rjust(width) for v in row))
    return "\n".join(lines)


def cmd_train(args: argparse.Namespace) -> int:
    """Handler of ``impactline train``."""
    runs = _check_runs(args.runs)
    features = None if args.features is None else _split(args.features)
    model, report = train_model(runs, args.labels, features=features, use_shape=not args.no_shape,
                                trees=args.trees, folds=args.folds, seed=args.seed)
    path = model.save(args.out)
    lines = [f"labelled events used: {report['n_labelled']}" + (
        f" ({report['unmatched']} labels matched no event)" if report["unmatched"] else ""),
        "classes: " + ", ".join(f"{c} ({n})" for c, n in zip(report["classes"], report["counts"], strict=True)),
        f"inputs: {len(model.input_names)} ({'shape points + ' if model.use_shape else ''}"
        f"{', '.join(model.features) or 'no scalar features'})",
        f"cross-validated accuracy ({report['folds']} folds): {report['accuracy']:.4f} "
        f"(folds {', '.join(f'{a:.3f}' for a in report['fold_accuracy'])})",
        "confusion matrix (held-out folds):", format_confusion(report["classes"], report["confusion"]),
        f"model: {path} ({model.n_trees} trees, {int(model.offsets[-1])} nodes; plain arrays, no pickle)"]
    print("\n".join(lines))
    return EXIT_OK


# ------------------------------------------------------------------------------------------------ classify
def classify_runs(runs: list[str | Path], model_path: str | Path, registry=None) -> dict[str, pa.Table]:
    """Label the events of each run with a trained model; write ``classes.parquet``; return the tables."""
    from .registry import default_registry

    registry = registry or default_registry()
    stage = registry.create("classifier", "forest", {"model": str(model_path)})
    model = ForestModel.load(model_path)
    columns = {"file": CONTRACT_COLUMNS["file"], "event_id": CONTRACT_COLUMNS["event_id"], **stage.columns}
    stamp = {"impactline.version": __version__, "impactline.classifier": "forest",
             "impactline.model": str(Path(model_path).resolve()),
             "impactline.model_accuracy": str(model.meta.get("accuracy")),
             "impactline.created": datetime.now(UTC).isoformat()}
    out = {}
    for run in runs:
        events = load_run_events([run], columns=[*_READ_COLUMNS, *model.features])
        values = stage.fit_predict(events) if events.num_rows else {name: [] for name in stage.columns}
        data = {"file": events.column("file"), "event_id": events.column("event_id"), **values}
        table = _table(columns, data, stamp)
        write_sidecar(table, run, CLASSES_TABLE)
        out[str(run)] = table
    return out


def cmd_classify(args: argparse.Namespace) -> int:
    """Handler of ``impactline classify``."""
    runs = _check_runs(args.runs)
    tables = classify_runs(runs, args.model)
    for run, table in tables.items():
        labels = [v if v is not None else "(no shape)" for v in table.column("label").to_pylist()]
        names, counts = np.unique(np.asarray(labels, dtype=str), return_counts=True) if labels else ([], [])
        summary = ", ".join(f"{n}: {c}" for n, c in zip(names, counts, strict=True)) or "no events"
        print(f"{run}: {table.num_rows} events -> {summary}; written {CLASSES_TABLE}")
    return EXIT_OK
