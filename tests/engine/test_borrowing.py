"""Kernels that borrow their caller's arrays (engine/borrowing.py): which ones, and their rules.

The rules come from how numba's runtime counts references to arrays (numba's documentation,
"Notes on Numba Runtime"): a kernel compiled without it must allocate no array and hand no array
back to a counting caller.
"""

from __future__ import annotations

import importlib
import inspect
import pkgutil

import numpy as np
import pytest
from numba import types
from numba.core.dispatcher import Dispatcher
from numba.core.errors import NumbaError

import lampyr.engine as engine
from lampyr.engine.borrowing import borrowing


def _engine_kernels():
    """(module name, function name, dispatcher) for every numba kernel defined in engine/."""
    found = []
    for info in pkgutil.iter_modules(engine.__path__):
        module = importlib.import_module(f"lampyr.engine.{info.name}")
        for name, obj in vars(module).items():
            if isinstance(obj, Dispatcher) and obj.py_func.__module__ == module.__name__:
                found.append((info.name, name, obj))
    return found


def _borrows(d: Dispatcher) -> bool:
    return d.targetoptions.get("_nrt") is False


def _inlined(d: Dispatcher) -> bool:
    return d.targetoptions.get("inline", "never") == "always"


def _takes_scene(d: Dispatcher) -> bool:
    params = list(inspect.signature(d.py_func).parameters)
    return bool(params) and params[0] == "S"


def _holds_array(t) -> bool:
    if isinstance(t, types.Array):
        return True
    if isinstance(t, types.BaseTuple):
        return any(_holds_array(x) for x in t.types)
    return False


KERNELS = _engine_kernels()
BORROWING = [(m, n, d) for m, n, d in KERNELS if _borrows(d)]


def test_every_kernel_that_takes_the_scene_and_is_called_borrows():
    """A kernel given the ~45-array scene pays ~90 atomic counts per call unless it borrows;
    only inlined kernels (no call) and render_tile (it allocates its threads' scratch) count."""
    counting = [f"{m}.{n}" for m, n, d in KERNELS
                if _takes_scene(d) and not _inlined(d) and not _borrows(d)]
    assert counting == ["integrator.render_tile"]


def test_the_wide_bvh_traversals_borrow():
    names = {f"{m}.{n}" for m, n, _ in BORROWING}
    assert {"wide_traversal.intersect_wide", "wide_traversal.intersect_wide_at", "wide_traversal.occluded_wide",
            "wide_traversal.occluded_wide_at"} <= names


def _signatures(d: Dispatcher):
    """Every signature of d known here: compiled in this process, or in numba's cache for this
    machine (loading it registers its return type without compiling)."""
    index = d._cache._cache_file._load_index()
    magic = d.targetctx.codegen().magic_tuple()
    for key in index:
        if key[1] == magic and tuple(key[0]) not in d.overloads:
            d.compile(tuple(key[0]))
    return d.nopython_signatures


def test_no_borrowing_kernel_returns_an_array(tiny_shot):
    """After a render every kernel it reaches is compiled, here or in the cache; none of the
    borrowing ones may hand back an array (or a tuple holding one)."""
    from lampyr.engine.render import render_frame
    from lampyr.engine.shot import load_shot

    film = render_frame(load_shot(tiny_shot), 1, 0, 1)
    assert film.n.sum() == 16 * 12
    typed = {f"{m}.{n}": _signatures(d) for m, n, d in BORROWING}
    reached = {name for name, sigs in typed.items() if sigs}
    # what a render reaches: the path, the scene queries, lights, surfaces and the traversals
    assert {"integrator.trace_path", "integrator.shadow_transmittance", "scene.intersect_scene",
            "scene.occluded_scene", "scene.intersect_instance", "lights.sample_light",
            "lights.env_radiance", "surface.resolve_material", "surface.hit_surface",
            "wide_traversal.intersect_wide", "wide_traversal.occluded_wide"} <= reached
    returning_arrays = [f"{name} -> {sig.return_type}" for name, sigs in typed.items()
                        for sig in sigs if _holds_array(sig.return_type)]
    assert returning_arrays == []


def test_an_allocation_in_a_borrowing_kernel_is_a_compile_error():
    @borrowing()
    def allocates(n):
        return np.zeros(n).sum()

    with pytest.raises(NumbaError):
        allocates(3)
