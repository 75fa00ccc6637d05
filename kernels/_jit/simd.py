"""Explicit vector code for the rows of the patch stencil.

The patch product spends most of its time on the inside rows of its patches
(:mod:`hatkernels._jit.patch_product`).  Written as a plain loop, LLVM vectorises each
row with a check, at run time, that the output does not overlap the inputs (about
fifty instructions), an 8-lane loop and a scalar remainder of up to seven points.  At
``n = 64`` a row has 31 points on average, and the check and the remainder cost about
as much as the vector loop: in cache, the rows of a 64-patch took 0.62 ns per point on
one core against 0.47 for rows of 1024 points.  :func:`stencil_row` makes the same
sums with explicit vectors: 8-lane ones along the row, the last of them overlapping
the one before it (the points in both are written twice, with the same bits), 4-lane
ones for rows of 4 to 7 points and the plain loop below that.  A row's first and last
point read two neighbours each on the patch's sides: those lanes are set from scalars
after the vector loads, so the ends need no pass of their own.

Each vector's loads come before its store, as each point's do in the plain loop, and
every lane makes its sum term for term in the same order, with no fused multiply-add:
the results are the same bits as the plain loop's (:func:`stencil_row_plain`, the
reference of the tests).  The caller guarantees that ``y`` does not overlap ``x`` or
``xb`` (the points written twice are read again from ``x``) and that every index is
inside its array: nothing here is checked.
"""

from llvmlite import ir
from numba import types, uint64
from numba.extending import intrinsic

from hatkernels._jit import jit

__all__ = ["stencil_row", "stencil_row_plain"]


def _stencil_vector(lanes, first=False, last=False):
    """An intrinsic ``f(x, xb, y, out, row, below, above, d, h, v, g, left, upleft, right,
    up)`` that writes ``y[out + l]`` for ``l < lanes``: the stencil of
    :func:`stencil_row_plain` at ``q = l`` with ``row``, ``below`` and ``above`` already
    advanced to the vector's first point.  With ``first``, lane 0 is the row's first
    point (its left and upper-left neighbours are ``left`` and ``upleft``); with
    ``last``, the last lane is the row's last point (``right``, ``up``)."""

    @intrinsic
    def stencil(typingctx, x, xb, y, out, row, below, above, d, h, v, g, left, upleft,
                right, up):
        arrays, indices = (x, xb, y), (out, row, below, above)
        scalars = (d, h, v, g, left, upleft, right, up)
        if not all(isinstance(a, types.Array) and a.dtype == types.float64 for a in arrays):
            return None
        if not all(isinstance(i, types.Integer) for i in indices):
            return None
        if not all(isinstance(w, (types.Float, types.Integer)) for w in scalars):
            return None
        sig = types.void(*arrays, *indices, *scalars)

        def codegen(context, builder, signature, args):
            tys = signature.args
            xa, ba, ya = (context.make_array(t)(context, builder, a)
                          for t, a in zip(tys[:3], args[:3], strict=True))
            i64, i32 = ir.IntType(64), ir.IntType(32)
            at, rw, bl, ab = (context.cast(builder, a, t, types.int64)
                              for a, t in zip(args[3:7], tys[3:7], strict=True))
            dv, hv, vv, gv, lf, ul, rt, up_ = (context.cast(builder, a, t, types.float64)
                                               for a, t in zip(args[7:], tys[7:], strict=True))
            vty = ir.VectorType(ir.DoubleType(), lanes)
            undef = ir.Constant(vty, ir.Undefined)
            zeros = ir.Constant(ir.VectorType(i32, lanes), [0] * lanes)

            def splat(a):
                s = builder.insert_element(undef, a, ir.Constant(i32, 0))
                return builder.shuffle_vector(s, undef, zeros)

            def load(ary, base, shift):
                index = builder.add(base, ir.Constant(i64, shift)) if shift else base
                ptr = builder.bitcast(builder.gep(ary.data, [index]), vty.as_pointer())
                return builder.load(ptr, align=8)

            def lane(vec, value, at_lane):
                return builder.insert_element(vec, value, ir.Constant(i32, at_lane))

            x_left, x_right = load(xa, rw, -1), load(xa, rw, 1)
            x_up, x_upleft = load(xa, ab, 0), load(xa, ab, -1)
            if first:
                x_left, x_upleft = lane(x_left, lf, 0), lane(x_upleft, ul, 0)
            if last:
                x_right, x_up = lane(x_right, rt, lanes - 1), lane(x_up, up_, lanes - 1)
            # d x[q] + h (x[q-1] + x[q+1]) + v (xb[b+q] + x[a+q]) + g (xb[b+q+1] + x[a+q-1]),
            # summed left to right as the plain loop does
            acc = builder.fmul(splat(dv), load(xa, rw, 0))
            acc = builder.fadd(acc, builder.fmul(splat(hv), builder.fadd(x_left, x_right)))
            acc = builder.fadd(acc, builder.fmul(splat(vv), builder.fadd(load(ba, bl, 0), x_up)))
            acc = builder.fadd(acc, builder.fmul(splat(gv), builder.fadd(load(ba, bl, 1),
                                                                         x_upleft)))
            ptr = builder.bitcast(builder.gep(ya.data, [at]), vty.as_pointer())
            builder.store(acc, ptr, align=8)
            return context.get_dummy_value()

        return sig, codegen

    return stencil


_stencil8, _stencil4 = _stencil_vector(8), _stencil_vector(4)
_first8, _last8, _both8 = (_stencil_vector(8, True, False), _stencil_vector(8, False, True),
                           _stencil_vector(8, True, True))
_first4, _last4, _both4 = (_stencil_vector(4, True, False), _stencil_vector(4, False, True),
                           _stencil_vector(4, True, True))


@jit(inline="always")
def stencil_row_plain(x, xb, y, row, below, above, width, d, h, v, g, left, upleft, right, up):
    """``y[row + q]`` for ``q = 0 .. width - 1``: ``d x[row+q] + h (x[row+q-1] + x[row+q+1])
    + v (xb[below+q] + x[above+q]) + g (xb[below+q+1] + x[above+q-1])``, where the first
    point's ``x[row-1]`` and ``x[above-1]`` are ``left`` and ``upleft`` and the last
    point's ``x[row+width]`` and ``x[above+width-1]`` are ``right`` and ``up`` (a patch's
    inside row: its ends' neighbours lie on the sides).  The plain loop, the reference
    of :func:`stencil_row`."""
    one = uint64(1)
    row, below, above, w = uint64(row), uint64(below), uint64(above), uint64(width)
    for q in range(uint64(0), w):
        xl = left if q == 0 else x[row + q - one]
        xr = right if q == w - one else x[row + q + one]
        xu = up if q == w - one else x[above + q]
        xul = upleft if q == 0 else x[above + q - one]
        y[row + q] = (d * x[row + q] + h * (xl + xr) + v * (xb[below + q] + xu)
                      + g * (xb[below + q + one] + xul))


@jit(inline="always")
def stencil_row(x, xb, y, row, below, above, width, d, h, v, g, left, upleft, right, up):
    """:func:`stencil_row_plain` in explicit vectors, the same bits: 8-lane vectors for rows of 8
    points or more (the first and the last with their end lane set from the sides, the
    last overlapping the one before), 4-lane ones for 4 to 7 points, the plain loop for
    fewer (``y`` must not overlap ``x`` or ``xb``; float64 arrays; the vectors read
    ``x[row - 1]`` to ``x[row + width]`` and ``x[above - 1]`` to ``x[above + width - 1]``,
    which must lie inside ``x``)."""
    # (the arguments spelt out at every call: a tuple of them passed with * made the
    # rows 35 % slower)
    four, eight = uint64(4), uint64(8)
    r, b, a, w = uint64(row), uint64(below), uint64(above), uint64(width)
    lf, ul, rt, up_ = left, upleft, right, up
    if w > eight:
        _first8(x, xb, y, r, r, b, a, d, h, v, g, lf, ul, rt, up_)
        q = eight
        while q + eight < w:
            _stencil8(x, xb, y, r + q, r + q, b + q, a + q, d, h, v, g, lf, ul, rt, up_)
            q += eight
        q = w - eight  # the last 8 points, overlapping the vector before
        _last8(x, xb, y, r + q, r + q, b + q, a + q, d, h, v, g, lf, ul, rt, up_)
    elif w == eight:
        _both8(x, xb, y, r, r, b, a, d, h, v, g, lf, ul, rt, up_)
    elif w > four:
        _first4(x, xb, y, r, r, b, a, d, h, v, g, lf, ul, rt, up_)
        q = w - four
        _last4(x, xb, y, r + q, r + q, b + q, a + q, d, h, v, g, lf, ul, rt, up_)
    elif w == four:
        _both4(x, xb, y, r, r, b, a, d, h, v, g, lf, ul, rt, up_)
    else:
        stencil_row_plain(x, xb, y, r, b, a, w, d, h, v, g, lf, ul, rt, up_)
