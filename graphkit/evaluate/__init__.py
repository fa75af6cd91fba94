"""Quality and drift measures of node vectors: link prediction, node classification, version drift, alignment.

The package holds four parts:

* :mod:`graphkit.evaluate.holdout`: holdout preparation for link prediction (:func:`holdout_edges`,
  :class:`EdgeHoldout`);
* :mod:`graphkit.evaluate.measures`: the measures (:func:`link_prediction` with :func:`auc_delong` and
  :func:`auc_se_hanley_mcneil`, :func:`node_classification`, :func:`neighbour_overlap`) and the protocol they follow;
* :mod:`graphkit.evaluate.alignment`: Procrustes (:func:`procrustes_rotation`, :func:`procrustes_residual`);
* :mod:`graphkit.evaluate.validate`: the argument checks they share.

Everything is re-exported here, so ``from graphkit.evaluate import X`` keeps working for every name it served
before the split.
"""

from __future__ import annotations

from ..checks import check_int as _check_int
from .alignment import _PROCRUSTES_ROWS, _cross_product, procrustes_residual, procrustes_rotation
from .holdout import (_MAX_BATCH, EdgeHoldout, _all_non_edges, _edge_keys, _protect_arcs, _sample_non_edges,
                      _spanning_forest, holdout_edges)
from .measures import (DEFAULT_RATIOS, _check_scores, _knn, _label_matrix, _Rows, _safe_norms, _top_k, auc_delong,
                       auc_se_hanley_mcneil, link_prediction, neighbour_overlap, node_classification)
from .validate import (_BLOCK_ELEMS, _MAX_SEED, _check_pairs, _check_ratio, _check_seed, _check_shared,
                       _check_vectors, _sklearn_seed)

__all__ = ["EdgeHoldout", "holdout_edges", "link_prediction", "auc_delong", "auc_se_hanley_mcneil",
           "node_classification", "neighbour_overlap", "procrustes_rotation", "procrustes_residual", "DEFAULT_RATIOS"]

# Private names served before the split; listed so that they count as used.
_KEPT = (_check_int, _PROCRUSTES_ROWS, _cross_product, _MAX_BATCH, _all_non_edges, _edge_keys, _protect_arcs,
         _sample_non_edges, _spanning_forest, _check_scores, _knn, _label_matrix, _Rows, _safe_norms, _top_k,
         _BLOCK_ELEMS, _MAX_SEED, _check_pairs, _check_ratio, _check_seed, _check_shared, _check_vectors,
         _sklearn_seed)
