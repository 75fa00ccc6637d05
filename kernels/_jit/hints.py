"""Hints to the processor that change no result.

:func:`prefetch` asks for the cache line holding ``arr[index]`` ahead of its
use (LLVM's ``llvm.prefetch``: a read, kept in every cache level).  The patch
product and smoother (:mod:`hatkernels._jit.patch_product`,
:mod:`hatkernels._jit.patch_smooth`, through
:func:`hatkernels._jit.patches.prefetch_edges`) use it for the coarse edges'
values that the next chunk of cells reads: they lie apart from the stream of
inside points, and read without a hint they cost about 0.2 us per cell at
6.4e7 points, several times their time in cache.
"""

from llvmlite import ir
from numba import types
from numba.extending import intrinsic

__all__ = ["prefetch"]


@intrinsic
def prefetch(typingctx, arr, index):
    """Prefetch the cache line of ``arr[index]`` (no effect on any value; ``index`` must be
    inside the array, as for a load)."""
    if not isinstance(arr, types.Array) or not isinstance(index, types.Integer):
        return None
    sig = types.void(arr, index)

    def codegen(context, builder, signature, args):
        ary = context.make_array(signature.args[0])(context, builder, args[0])
        ptr = builder.gep(ary.data, [args[1]])
        # through an i8 pointer: the intrinsic's name then suits typed and opaque pointers
        i8p, i32 = ir.IntType(8).as_pointer(), ir.IntType(32)
        fnty = ir.FunctionType(ir.VoidType(), [i8p, i32, i32, i32])
        fn = builder.module.declare_intrinsic("llvm.prefetch", [i8p], fnty)
        # read (0), kept in every cache level (3), a data cache (1)
        builder.call(fn, [builder.bitcast(ptr, i8p), ir.Constant(i32, 0), ir.Constant(i32, 3),
                          ir.Constant(i32, 1)])
        return context.get_dummy_value()

    return sig, codegen
