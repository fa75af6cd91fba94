"""Quality and drift measures of a set of node vectors: link prediction, node classification, version drift.

Link prediction holds out edges before the walks (:func:`holdout_edges`) and scores them against sampled non-edges
(:func:`link_prediction`). Node classification follows the protocol of the DeepWalk paper (Perozzi, Al-Rfou &
Skiena, KDD 2014): one-vs-rest logistic regression trained on a growing fraction of the labelled nodes, repeated
over random splits (:func:`node_classification`). Drift compares two versions on the nodes they share
(:func:`neighbour_overlap`, :func:`procrustes_residual`).

Every function is seeded: the same inputs and seed give the same result. Nothing here is quadratic in the number of
nodes or edges; the nearest-neighbour search of the drift measure is ``O(sample * n_nodes)``.
"""

from __future__ import annotations

import warnings

import numpy as np

from ..checks import check_int as _check_int
from ..errors import ConfigError
from .validate import (_BLOCK_ELEMS, _check_pairs, _check_ratio, _check_seed, _check_shared, _check_vectors,
                       _sklearn_seed)

__all__ = ["link_prediction", "auc_delong", "auc_se_hanley_mcneil", "node_classification", "neighbour_overlap",
           "DEFAULT_RATIOS"]

#: Training ratios of the node-classification protocol (10% to 90% of the labelled nodes).
DEFAULT_RATIOS = (0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9)


def _check_scores(name, scores) -> np.ndarray:
    x = np.asarray(scores, dtype=np.float64).ravel()
    if x.size < 1:
        raise ConfigError(f"{name} must hold at least 1 score, got none")
    if not np.all(np.isfinite(x)):
        raise ConfigError(f"{name} holds NaN or infinite scores")
    return x


def auc_delong(positive_scores, negative_scores) -> tuple[float, float]:
    """ROC-AUC of two score samples and its standard error by DeLong's variance.

    The AUC is the Mann-Whitney statistic ``P(X > Y) + P(X = Y) / 2`` over all (positive, negative) pairs, equal to
    ``sklearn.metrics.roc_auc_score``. Its variance is DeLong's nonparametric estimate (DeLong, DeLong &
    Clarke-Pearson, "Comparing the areas under two or more correlated receiver operating characteristic curves: a
    nonparametric approach", Biometrics 44, 1988): with the placement values ``V10[i]`` (share of negatives below
    positive ``i``, ties counting half) and ``V01[j]`` (share of positives above negative ``j``),
    ``Var(AUC) = var(V10) / m + var(V01) / n`` (sample variances, ``ddof=1``). The placements come from mid-ranks
    (Sun & Xu, "Fast implementation of DeLong's algorithm", IEEE Signal Processing Letters 21, 2014), so the cost is
    one sort, ``O((m + n) log(m + n))``.

    Parameters
    ----------
    positive_scores, negative_scores : array_like of float, shape (m,) and (n,)
        Scores of the pairs that are edges and of those that are not; at least one of each (a sample of one
        adds no variance term).

    Returns
    -------
    (auc, se) : (float, float)
    """
    from scipy.stats import rankdata

    x = _check_scores("positive_scores", positive_scores)
    y = _check_scores("negative_scores", negative_scores)
    m, n = x.size, y.size
    ranks = rankdata(np.concatenate([x, y]))  # mid-ranks: ties count half
    rx, ry = rankdata(x), rankdata(y)
    v10 = (ranks[:m] - rx) / n  # negatives below each positive
    v01 = 1.0 - (ranks[m:] - ry) / m  # positives above each negative
    auc = float(v10.mean())
    var = (v10.var(ddof=1) if m > 1 else 0.0) / m + (v01.var(ddof=1) if n > 1 else 0.0) / n
    return auc, float(np.sqrt(max(var, 0.0)))


def auc_se_hanley_mcneil(auc, n_positive, n_negative) -> float:
    """Standard error of an AUC from its value and the two sample sizes alone (Hanley & McNeil, "The meaning and
    use of the area under a receiver operating characteristic (ROC) curve", Radiology 143, 1982, eq. 1 with
    ``Q1 = A / (2 - A)`` and ``Q2 = 2 A^2 / (1 + A)``).

    It assumes a particular (exponential) shape of the two score distributions, so it is a planning figure: how
    many held-out edges a wanted precision needs before anything is scored. :func:`auc_delong` measures the SE of
    the scores at hand.
    """
    a = float(auc)
    if not 0.0 <= a <= 1.0:
        raise ConfigError(f"auc must be in [0, 1], got {auc!r}")
    m = _check_int("n_positive", n_positive, 1)
    n = _check_int("n_negative", n_negative, 1)
    q1, q2 = a / (2.0 - a), 2.0 * a * a / (1.0 + a)
    var = (a * (1.0 - a) + (m - 1) * (q1 - a * a) + (n - 1) * (q2 - a * a)) / (m * n)
    return float(np.sqrt(max(var, 0.0)))


def link_prediction(vectors, positives, negatives, *, seed=0) -> dict:
    """Score held-out edges against non-edges with two scorers and report ROC-AUC and average precision.

    - Cosine: the cosine similarity of the two vectors, on all pairs (no fitting).
    - Hadamard: a logistic regression on the element-wise product of the two vectors (the edge operator chosen by
      Grover & Leskovec, KDD 2016), features standardised, fitted on a stratified random half of the pairs and
      scored on the other half.

    Parameters
    ----------
    vectors : ndarray of float, shape (n_nodes, dim)
    positives, negatives : array_like of int, shape (n_pairs, 2)
        Node-index pairs that are edges (held out before training) and that are not; each needs at least 2 pairs.
    seed : int, default 0
        Seeds the train/test split of the Hadamard scorer.

    Returns
    -------
    dict
        ``link_auc_cosine``, ``link_ap_cosine``, ``link_auc_hadamard``, ``link_ap_hadamard`` (floats, computed by
        ``sklearn.metrics.roc_auc_score`` and ``average_precision_score``), ``link_auc_cosine_se`` and
        ``link_auc_hadamard_se`` (standard errors of the two AUCs by DeLong's variance, :func:`auc_delong`),
        ``link_pairs`` (all pairs) and ``link_test_pairs`` (pairs the Hadamard scorer is evaluated on).

    Raises
    ------
    ConfigError
        Bad shapes, dtypes or node indices, non-finite vectors, or fewer than 2 pairs of a kind.
    """
    from sklearn.linear_model import LogisticRegression
    from sklearn.metrics import average_precision_score, roc_auc_score
    from sklearn.model_selection import train_test_split
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    x = _check_vectors("vectors", vectors)
    pos = _check_pairs("positives", positives, x.shape[0])
    neg = _check_pairs("negatives", negatives, x.shape[0])
    if pos.shape[0] < 2 or neg.shape[0] < 2:
        raise ConfigError(f"link prediction needs at least 2 positive and 2 negative pairs, "
                          f"got {pos.shape[0]} and {neg.shape[0]}")
    rng = np.random.default_rng(_check_seed(seed))
    pairs = np.concatenate([pos, neg])
    y = np.concatenate([np.ones(pos.shape[0], np.int8), np.zeros(neg.shape[0], np.int8)])
    a = x[pairs[:, 0]].astype(np.float64)
    b = x[pairs[:, 1]].astype(np.float64)
    norms = np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1)
    cosine = np.einsum("ij,ij->i", a, b) / np.where(norms > 0, norms, 1.0)  # a zero vector scores 0

    hadamard = a * b
    train, test = train_test_split(np.arange(y.size), test_size=0.5, stratify=y, random_state=_sklearn_seed(rng))
    model = make_pipeline(StandardScaler(), LogisticRegression(max_iter=1000))
    model.fit(hadamard[train], y[train])
    score = model.decision_function(hadamard[test])
    _, se_cosine = auc_delong(cosine[y == 1], cosine[y == 0])
    _, se_hadamard = auc_delong(score[y[test] == 1], score[y[test] == 0])
    return {
        "link_auc_cosine": float(roc_auc_score(y, cosine)),
        "link_auc_cosine_se": se_cosine,
        "link_ap_cosine": float(average_precision_score(y, cosine)),
        "link_auc_hadamard": float(roc_auc_score(y[test], score)),
        "link_auc_hadamard_se": se_hadamard,
        "link_ap_hadamard": float(average_precision_score(y[test], score)),
        "link_pairs": int(y.size),
        "link_test_pairs": int(test.size),
    }


def _label_matrix(node_idx, label, n_rows):
    """Labelled rows, their 0/1 label matrix, the class values and the number of rows without a vector."""
    node_idx = np.asarray(node_idx)
    label = np.asarray(label)
    if node_idx.ndim != 1 or label.ndim != 1 or node_idx.shape != label.shape:
        raise ConfigError(f"node_idx and label must be 1-D arrays of the same length, "
                          f"got shapes {node_idx.shape} and {label.shape}")
    if node_idx.dtype.kind not in "iu":
        raise ConfigError(f"node_idx must hold integer node indices, got dtype {node_idx.dtype}")
    if node_idx.size and node_idx.max() >= n_rows:
        raise ConfigError(f"node_idx must be below the number of vectors ({n_rows}), got {node_idx.max()}")
    has_vector = node_idx >= 0
    n_unmatched = int(node_idx.size - has_vector.sum())
    try:
        classes, code = np.unique(label[has_vector], return_inverse=True)
    except TypeError as exc:  # mixed or missing (None) values in an object array
        raise ConfigError(f"label values must be all numbers or all strings, without nulls ({exc})") from None
    rows, row_of = np.unique(node_idx[has_vector], return_inverse=True)
    # int32, not int8: scikit-learn 1.9's OneVsRestClassifier pairs the estimators with the wrong columns of an int8
    # label matrix of more than 127 labels (every prediction shifted by 128 columns; tests/test_evaluate.py)
    y = np.zeros((rows.size, classes.size), dtype=np.int32)
    y[row_of, code] = 1  # a repeated (node, label) pair counts once
    return rows, y, classes, n_unmatched


def _top_k(scores, k):
    """0/1 matrix marking the ``k[i]`` highest scores of row ``i``."""
    order = np.argsort(-scores, axis=1, kind="stable")
    out = np.zeros(scores.shape, dtype=np.int32)
    take = np.arange(scores.shape[1])[None, :] < k[:, None]
    np.put_along_axis(out, order, take.astype(np.int32), axis=1)
    return out


def node_classification(vectors, node_idx, label, *, ratios=DEFAULT_RATIOS, repeats=5, max_nodes=None,
                        seed=0) -> dict:
    """Micro- and Macro-F1 of a one-vs-rest logistic regression on the vectors, over training ratios and splits.

    The protocol of the DeepWalk paper (Perozzi, Al-Rfou & Skiena 2014): for every ratio, ``repeats`` random splits
    of the labelled nodes train ``OneVsRestClassifier(LogisticRegression)`` on that share and score the rest. A node
    may carry several labels; like the paper, each test node is given its ``k`` highest-scoring labels, where ``k``
    is its true number of labels, so the score measures how well labels are ranked, not how many are predicted.
    Macro-F1 averages over the labels present in the test split.

    Parameters
    ----------
    vectors : ndarray of float, shape (n_nodes, dim)
    node_idx : array_like of int, shape (n_rows,)
        Row of ``vectors`` for each (node, label) row; ``-1`` (a labelled node with no vector) rows are skipped and
        counted.
    label : array_like, shape (n_rows,)
        Label values (numbers or strings); a node with several labels has several rows.
    ratios : sequence of float, default 0.1 to 0.9
        Shares of the labelled nodes used for training, each in (0, 1).
    repeats : int, default 5
        Random splits per ratio.
    max_nodes : int, optional
        Use a random subset of at most this many labelled nodes; the cost grows with labelled nodes x labels x
        ``len(ratios)`` x ``repeats`` (one split at ratio 0.9 with 10,000 nodes and 50 labels took about 5 s on
        two cores).
    seed : int, default 0

    Returns
    -------
    dict
        ``per_ratio``: list of dicts (``ratio``, ``micro_f1_mean``, ``micro_f1_std``, ``macro_f1_mean``,
        ``macro_f1_std``; std over the splits with ``ddof=1``, 0 for a single split); ``micro_f1_at_10`` and
        ``macro_f1_at_10`` (means at ratio 0.1, present when 0.1 is among ``ratios``); ``n_labelled`` (nodes),
        ``n_classes``, ``n_unmatched`` (rows skipped) and ``repeats``.

    Raises
    ------
    ConfigError
        Bad shapes, dtypes or values; fewer than 2 labelled nodes with vectors or fewer than 2 distinct labels.
    """
    from sklearn.linear_model import LogisticRegression
    from sklearn.metrics import f1_score
    from sklearn.multiclass import OneVsRestClassifier

    x = _check_vectors("vectors", vectors)
    ratios = [_check_ratio("ratios", r) for r in ratios]
    if not ratios:
        raise ConfigError("ratios must hold at least one training ratio, got an empty sequence")
    repeats = _check_int("repeats", repeats, 1)
    max_nodes = None if max_nodes is None else _check_int("max_nodes", max_nodes, 2)
    rng = np.random.default_rng(_check_seed(seed))
    rows, y, classes, n_unmatched = _label_matrix(node_idx, label, x.shape[0])
    if max_nodes is not None and rows.size > max_nodes:
        subset = np.sort(rng.choice(rows.size, size=max_nodes, replace=False))
        rows, y = rows[subset], y[subset]
        used = y.any(axis=0)  # labels carried only by dropped nodes leave the problem
        y, classes = y[:, used], classes[used]
    if rows.size < 2 or classes.size < 2:
        raise ConfigError(f"node classification needs at least 2 labelled nodes with vectors and 2 distinct labels, "
                          f"got {rows.size} nodes and {classes.size} labels")
    features = x[rows].astype(np.float64)
    per_ratio = []
    for ratio in ratios:
        n_train = min(max(int(round(ratio * rows.size)), 1), rows.size - 1)
        micro, macro = [], []
        for _ in range(repeats):
            perm = rng.permutation(rows.size)
            train, test = perm[:n_train], perm[n_train:]
            model = OneVsRestClassifier(LogisticRegression(solver="liblinear"))
            with warnings.catch_warnings():
                # A label absent from (or carried by all of) a small training split gets a constant predictor: expected.
                warnings.filterwarnings("ignore", message="Label .* is present in all training examples")
                model.fit(features[train], y[train])
                scores = model.predict_proba(features[test])
            y_test = y[test]
            pred = _top_k(scores, y_test.sum(axis=1))
            present = np.flatnonzero(y_test.sum(axis=0) > 0)
            micro.append(f1_score(y_test, pred, average="micro", zero_division=0))
            macro.append(f1_score(y_test, pred, average="macro", labels=present, zero_division=0))
        ddof = 1 if repeats > 1 else 0
        per_ratio.append({"ratio": ratio, "micro_f1_mean": float(np.mean(micro)),
                          "micro_f1_std": float(np.std(micro, ddof=ddof)),
                          "macro_f1_mean": float(np.mean(macro)), "macro_f1_std": float(np.std(macro, ddof=ddof))})
    out = {"per_ratio": per_ratio, "n_labelled": int(rows.size), "n_classes": int(classes.size),
           "n_unmatched": n_unmatched, "repeats": repeats}
    for entry in per_ratio:
        if np.isclose(entry["ratio"], 0.1):
            out["micro_f1_at_10"] = entry["micro_f1_mean"]
            out["macro_f1_at_10"] = entry["macro_f1_mean"]
            break
    return out


class _Rows:
    """Row blocks of ``x`` (float32), optionally through a row map (``x[rows[a:b]]``), checked to be finite."""

    def __init__(self, name, x, rows=None):
        self.name, self.x, self.rows = name, x, rows
        self.n = x.shape[0] if rows is None else rows.size

    def block(self, a, b) -> np.ndarray:
        idx = slice(a, b) if self.rows is None else self.rows[a:b]
        out = np.asarray(self.x[idx], dtype=np.float32)
        if not np.isfinite(out).all():
            raise ConfigError(f"{self.name} holds NaN or infinite values")
        return out

    def take(self, index) -> np.ndarray:
        return np.asarray(self.x[index if self.rows is None else self.rows[index]], dtype=np.float32)


def _safe_norms(x) -> np.ndarray:
    norm = np.linalg.norm(x, axis=1)
    return np.where(norm > 0, norm, 1.0).astype(np.float32)  # a zero vector has cosine 0 with every other


def _knn(rows: _Rows, queries, k) -> np.ndarray:
    """Indices (int64 [len(queries), k], sorted) of the ``k`` nearest rows by cosine, self excluded.

    The rows are read block by block (a memory map is never copied whole): each block's similarities to every
    query, at most ``_BLOCK_ELEMS`` of them, then its ``k`` best per query merged into a running top ``k``.
    Memory: ``O(len(queries) * (k + block))``, independent of the number of rows beyond the block."""
    n, m = rows.n, queries.size
    q = rows.take(queries)
    q /= _safe_norms(q)[:, None]
    step = max(k + 1, _BLOCK_ELEMS // max(m, 1))
    best_sim = np.full((m, k), -np.inf, dtype=np.float32)
    best_idx = np.full((m, k), -1, dtype=np.int64)
    qpos = np.arange(m)
    for a in range(0, n, step):
        b = min(n, a + step)
        block = rows.block(a, b)
        sim = q @ block.T
        sim /= _safe_norms(block)[None, :]
        del block
        inside = (queries >= a) & (queries < b)
        sim[qpos[inside], queries[inside] - a] = -np.inf  # a node is not its own neighbour
        if b - a > k:
            part = np.argpartition(sim, b - a - k, axis=1)[:, b - a - k:]
        else:
            part = np.broadcast_to(np.arange(b - a), (m, b - a))
        cand_sim = np.concatenate([best_sim, np.take_along_axis(sim, part, axis=1)], axis=1)
        cand_idx = np.concatenate([best_idx, part + a], axis=1)
        del sim, part
        keep = np.argpartition(cand_sim, cand_sim.shape[1] - k, axis=1)[:, cand_sim.shape[1] - k:]
        best_sim = np.take_along_axis(cand_sim, keep, axis=1)
        best_idx = np.take_along_axis(cand_idx, keep, axis=1)
    best_idx.sort(axis=1)
    return best_idx


def neighbour_overlap(prev, cur, *, k=10, sample=2000, seed=0, cur_rows=None) -> float:
    """Mean share of the ``k`` nearest neighbours (cosine) that two versions agree on.

    Parameters
    ----------
    prev, cur : ndarray of float, shape (n_shared, dim_prev) and (n_shared, dim_cur)
        Vectors of the same nodes in the same row order (the dimensions may differ). Memory maps are read block
        by block, never copied whole.
    k : int, default 10
        Neighbours per node; lowered to ``n_shared - 1`` on smaller sets.
    sample : int, default 2000
        Query nodes, drawn without replacement (all nodes when ``n_shared <= sample``). Cost
        ``O(sample * n_shared * dim)``; memory ``O(sample * dim)`` plus at most 64 MB of similarities at a time.
    seed : int, default 0
    cur_rows : ndarray of int, shape (n_shared,), optional
        Row ``i`` of ``prev`` pairs with row ``cur_rows[i]`` of ``cur`` (``cur`` may then hold more rows): the
        shared rows of a larger matrix without gathering them into a copy.

    Returns
    -------
    float
        Mean over the query nodes of ``|kNN_prev & kNN_cur| / k``, in [0, 1]; for two unrelated sets about
        ``k / (n_shared - 1)``.

    Raises
    ------
    ConfigError
        Bad shapes or values, fewer than 2 shared nodes.
    """
    prev, cur, cur_rows = _check_shared(prev, cur, cur_rows)
    k = _check_int("k", k, 1)
    sample = _check_int("sample", sample, 1)
    rng = np.random.default_rng(_check_seed(seed))
    n = prev.shape[0]
    if n < 2:
        raise ConfigError(f"neighbour overlap needs at least 2 shared nodes, got {n}")
    k = min(k, n - 1)
    queries = np.sort(rng.choice(n, size=min(sample, n), replace=False))
    a = _knn(_Rows("prev", prev), queries, k)
    b = _knn(_Rows("cur", cur, cur_rows), queries, k)
    common = (a[:, :, None] == b[:, None, :]).any(axis=2).sum(axis=1)
    return float(common.mean() / k)
