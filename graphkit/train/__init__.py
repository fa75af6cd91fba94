"""Skip-gram training of node vectors on a walk corpus.

The package holds four parts:

* :mod:`graphkit.train.kernels`: the numba arithmetic (gradients, updates, draws) and the exact definition of the
  training streams;
* :mod:`graphkit.train.tables`: what the kernels read besides the walks (stream keys, alias and sigmoid tables,
  subsampling thresholds, initial vectors);
* :mod:`graphkit.train.feeder`: walk chunks checked, compacted and read one chunk ahead (:class:`ChunkReader`);
* :mod:`graphkit.train.driver`: :func:`train_vectors`.

Everything is re-exported here, so ``from graphkit.train import X`` keeps working for every name it served before
the split (the private kernel names included: the tests reach into them).
"""

from __future__ import annotations

from ..checks import check_int as _check_int
from ..huffman import build_huffman
from ..prefetch import prefetch as _prefetch
from ..rng import G as _G, LOW32 as _LOW32, S32 as _S32, mix_kernel as _mix_kernel
from .driver import OBJECTIVES, _check_init, _check_memmap_dir, _check_rate, _weight_matrix, train_vectors
from .feeder import (ChunkReader, _check_counts, _ChunkReader, _chunks, _compact, _is_one_shot, _resolve_counts,
                     compact_chunk, is_one_shot, resolve_counts, walk_chunks)
from .kernels import (_BLOCK, _MAX_DOT, _apply_kernel, _draw_kernel, _draw_negatives_kernel, _gradients_kernel,
                      _keep_visits_kernel, _prefetch_row_kernel, _prefetch_targets_kernel, _scratch_kernel,
                      _sigmoid_kernel, _targets_kernel, _train_parallel_kernel, _train_serial_kernel,
                      _train_walks_kernel)
from .tables import (INIT_SALT, SIG_POINTS, TRAIN_SALT, _MASK64, _mix_int, alias_table, initial_vectors,
                     keep_thresholds, sigmoid_table, stream_key)

__all__ = ["train_vectors", "alias_table", "initial_vectors", "keep_thresholds", "sigmoid_table", "stream_key",
           "ChunkReader", "compact_chunk", "walk_chunks", "resolve_counts", "is_one_shot", "OBJECTIVES",
           "TRAIN_SALT", "INIT_SALT", "SIG_POINTS"]

# Private names served before the split (the tests reach into the kernels and the chunk reader); listed so that
# they count as used.
_KEPT = (_check_int, build_huffman, _prefetch, _G, _LOW32, _S32, _mix_kernel, _check_init, _check_memmap_dir,
         _check_rate, _weight_matrix, _check_counts, _ChunkReader, _chunks, _compact, _is_one_shot, _resolve_counts,
         _BLOCK, _MAX_DOT, _apply_kernel, _draw_kernel, _draw_negatives_kernel, _gradients_kernel,
         _keep_visits_kernel, _prefetch_row_kernel, _prefetch_targets_kernel, _scratch_kernel, _sigmoid_kernel,
         _targets_kernel, _train_parallel_kernel, _train_serial_kernel, _train_walks_kernel, _MASK64, _mix_int)
