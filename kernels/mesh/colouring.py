"""Colourings of element blocks: which blocks a product may run side by side.

The raw kernels take a colouring as three arguments, ``(block_size,
colour_ptr, blocks)``, in that order; :class:`Colouring` holds them under
names and unpacks into them (``*colouring``).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from hatkernels._jit import operators as _jit_ops

__all__ = ["Colouring", "triangle_colouring", "row_colouring", "block_size_for"]


def block_size_for(n_cells):
    """Cells per block for kernels bound by arithmetic and by the points blocks share:
    about ``n_cells / 32``, a power of two from 1024 to 2**20.

    Each point on a block's border is loaded once per colour, so larger blocks
    cost less, and fewer blocks need fewer colours (a pass over the vectors
    each); 32 blocks in 2 to 4 colours still give 8 to 16 threads a block
    each.  The size never depends on the thread count: the sums, and so the
    bits, do not either.  Measured on the ``inherited`` stiffness product
    (``rectangle(16, 16)`` refined 8 times, 33.5 million triangles, 2
    threads): blocks of 1024, 4096, 16384 and 65536 took 75, 58, 50 and 46 ms.
    The gmg V-cycle on ``rectangle(125, 125)`` refined 3, 4 and 5 times (2e6 to
    3.2e7 triangles, 2 threads, medians of 10 in one process, 2026-12-04):
    n/128 blocks (capped at 65536, 3 to 4 colours) against n/32 (2 colours): 35.5
    and 30.2 ms, 158 and 141 ms, 538 and 492 ms.  The element-by-element csr
    assembly and the ``edges`` and ``geometry`` products did not change beyond
    the noise.
    """
    target = max(1, int(n_cells) // 32)
    return int(min(1 << 20, max(1024, 1 << (target.bit_length() - 1))))


class Colouring(NamedTuple):
    """Blocks of ``block_size`` consecutive elements (or rows), grouped by colour.

    Blocks of colour ``c`` are ``blocks[ptr[c]:ptr[c + 1]]``; two blocks of
    one colour share no point, so they may add into the product at once.

    Attributes
    ----------
    block_size : int
    ptr : ndarray of int64, shape (n_colours + 1,)
    blocks : ndarray of int64, shape (n_blocks,)
    """

    block_size: int
    ptr: np.ndarray
    blocks: np.ndarray

    @property
    def n_colours(self):
        return self.ptr.size - 1

    @property
    def nbytes(self):
        return self.ptr.nbytes + self.blocks.nbytes

    def colour_of_blocks(self):
        """The colour of each block, shape (n_blocks,) (for checking a colouring)."""
        colour = np.empty(self.blocks.size, dtype=np.int64)
        for c in range(self.n_colours):
            colour[self.blocks[self.ptr[c] : self.ptr[c + 1]]] = c
        return colour


def _grouped(colour, block_size):
    """:class:`Colouring` from a colour per block, or None if the colouring failed."""
    if colour.size and colour[0] < 0:
        return None
    order = np.argsort(colour, kind="stable")
    counts = np.bincount(colour, minlength=int(colour.max(initial=-1)) + 1)
    ptr = np.zeros(counts.size + 1, dtype=np.int64)
    np.cumsum(counts, out=ptr[1:])
    return Colouring(block_size, ptr, order.astype(np.int64))


def triangle_colouring(triangles, n_points, block_size):
    """Blocks of ``block_size`` consecutive triangles, coloured; None if > 64 colours are needed."""
    return _grouped(_jit_ops.colour_blocks(triangles, n_points, block_size), block_size)


def row_colouring(starts, ends, n_points, rows_per_block):
    """Blocks of rows of an edge list by first point, coloured; None if > 64 colours are needed."""
    return _grouped(
        _jit_ops.colour_row_blocks(starts, ends, n_points, rows_per_block), rows_per_block
    )
