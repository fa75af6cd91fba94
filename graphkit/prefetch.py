"""The cache hint shared by the walk and training kernels.

``prefetch(arr, i)`` asks the CPU to start loading the cache line that holds ``arr[i]`` (``i`` an integer, or a
tuple of integers for a 2-D array: ``prefetch(emb, (row, col))``). It compiles to LLVM's ``llvm.prefetch`` (read,
high locality, data cache): no effect on results, and unlike a load an outstanding prefetch does not stall the
instructions after it. Under ``NUMBA_DISABLE_JIT=1`` it is a plain function that does nothing.
"""

from __future__ import annotations

import numba

__all__ = ["prefetch"]

if numba.config.DISABLE_JIT:
    def prefetch(arr, index):
        """Pure-Python mode: nothing to prefetch."""
        return None
else:
    from llvmlite import ir as _ir
    from numba.core import cgutils as _cgutils
    from numba.core import types as _types
    from numba.extending import intrinsic as _intrinsic

    @_intrinsic
    def prefetch(typingctx, arr, index):
        """Hint the CPU to fetch ``arr[index]`` into cache; ``index`` is an integer or a tuple of integers, one per
        dimension of ``arr``."""
        if not isinstance(arr, _types.Array):
            return None
        if isinstance(index, _types.BaseTuple):
            if len(index) != arr.ndim or not all(isinstance(t, _types.Integer) for t in index):
                return None
        elif not (isinstance(index, _types.Integer) and arr.ndim == 1):
            return None

        def codegen(context, builder, signature, args):
            aryty, idxty = signature.args
            ary = context.make_array(aryty)(context, builder, args[0])
            if isinstance(idxty, _types.BaseTuple):
                values = _cgutils.unpack_tuple(builder, args[1], len(idxty))
                types = list(idxty)
            else:
                values, types = [args[1]], [idxty]
            idx = [context.cast(builder, v, t, _types.intp) for v, t in zip(values, types)]
            ptr = _cgutils.get_item_pointer(context, builder, aryty, ary, idx, wraparound=False)
            i8p, i32 = _ir.IntType(8).as_pointer(), _ir.IntType(32)
            fnty = _ir.FunctionType(_ir.VoidType(), [i8p, i32, i32, i32])
            fn = _cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0")
            builder.call(fn, [builder.bitcast(ptr, i8p), i32(0), i32(3), i32(1)])
            return context.get_dummy_value()
        return _types.void(arr, index), codegen
