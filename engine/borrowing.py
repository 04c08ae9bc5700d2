"""`borrowing`: the jit decorator for kernels that only use arrays their caller owns.

numba counts references to arrays: a compiled function adds one to the count of every array it
is given when it is entered, and takes it away when it returns, each an atomic operation on the
array's shared record. The compiled scene (`scene.Scene`) is a tuple of some 45 arrays, so every
call of a kernel that takes it paid about 90 atomic operations — around 0.4 µs, where the work of
many such calls (a sphere test, a light's pdf, a material's lookup) is a few tens of ns. A path
vertex makes about ten such calls. Measured on the courtyard demo, one thread: 59 k samples/s
counted, 173 k borrowed, the pixels the same to the bit (bench/calls.py prints the cost of one
call both ways).

A kernel needs no counts when its caller keeps every array alive for the whole call, which holds
for any call made from compiled code. `borrowing` compiles without numba's runtime (its `_nrt`
option), so such kernels must keep two rules:

  * allocate no array: numba refuses to compile an allocation without its runtime (a compile
    error, never a wrong result);
  * return no array: a view handed back to a counting caller would be released once too often.
    tests/engine/test_borrowing.py checks every borrowing kernel's compiled signatures for that.

Every kernel that takes the scene and is not inlined borrows, and so do the wide BVH
traversals; the kernels that allocate scratch (`integrator.render_tile`) or build arrays do not.
"""

from __future__ import annotations

from numba import njit


def borrowing(**options):
    """numba's `njit`, cached, for a kernel that borrows its arguments (rules above); extra
    options (inline, ...) pass through."""
    return njit(cache=True, _nrt=False, **options)
