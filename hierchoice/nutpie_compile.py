"""Compiling a model for nutpie: a trace of the requested variables only, and C wrappers cached on disk.

nutpie (``nutpie.compile_pymc_model``) compiles the model's log-density and the
function that expands a draw into the stored variables with PyTensor's numba
backend, then wraps each in a C-callable numba ``cfunc`` so that its Rust sampler
can call it without Python. Two things about that default cost our users:

- **Memory.** nutpie stores every free variable with each draw, whatever
  ``var_names`` says. For a panel model that includes the (person, attribute)
  deviations, so memory grew with persons x draws even when no person draws are
  wanted (B3 at 4 x 1000 draws: 1.6 GB). :func:`_trim_expand` rebuilds the expand
  function for the requested variables only.
- **Compile time.** PyTensor caches its numba functions on disk, but numba
  compiles a ``cfunc`` from scratch in every process, and with it the whole
  log-density it calls: 3-6 s of a 17 s B1 run (docs/performance.md).
  :func:`_cached_logp_wrapper` and :func:`_cached_expand_wrapper` write the same
  wrappers as nutpie's, from generated source registered with PyTensor's numba
  cache under a key derived from the wrapped function's own cache key, so the
  second process loads them in milliseconds.

Both replace private nutpie functions for the length of one call; if nutpie's
internals are not what this expects, :func:`compile_nutpie` falls back to
nutpie's own compile and says so in the log.
"""

from __future__ import annotations

import hashlib
import logging
import uuid
from collections.abc import Sequence
from typing import Any

import numpy as np

log = logging.getLogger("hierchoice")

__all__ = ["compile_nutpie"]

#: Bumped whenever the generated wrapper source changes meaning (part of the cache key).
WRAPPER_VERSION = "1"


def compile_nutpie(model: Any, var_names: Sequence[str]) -> Any:
    """``nutpie.compile_pymc_model(model)`` whose trace holds ``var_names`` only, with cached C wrappers."""
    import nutpie
    import nutpie.compile_pymc as ncp

    patches = {
        "_make_functions": _trimming(getattr(ncp, "_make_functions", None), var_names),
        "_make_c_logp_func": _cached_logp_wrapper,
        "_make_c_expand_func": _cached_expand_wrapper,
    }
    originals = {name: getattr(ncp, name, None) for name in patches}
    if any(original is None for original in originals.values()) or not hasattr(ncp, "address_as_void_pointer"):
        log.warning("nutpie's internals changed: compiling with nutpie's own functions "
                    "(the trace keeps every free variable, and compiling takes longer)")
        return nutpie.compile_pymc_model(model, var_names=list(var_names))
    import pytensor

    for name, patch in patches.items():
        setattr(ncp, name, patch)
    try:
        # cache=True reaches numba.cfunc; the wrappers carry the keys it caches under, in PyTensor's cache
        return nutpie.compile_pymc_model(model, var_names=list(var_names), cache=bool(pytensor.config.numba__cache))
    finally:
        for name, original in originals.items():
            setattr(ncp, name, original)


def _trimming(builder: Any, var_names: Sequence[str]) -> Any:
    def trimmed(model, **kwargs):  # type: ignore[no-untyped-def]
        built = builder(model, **kwargs)
        try:
            return _trim_expand(model, built, var_names, kwargs)
        except Exception as err:  # nutpie's layout is not what this expects: keep nutpie's own
            log.warning("could not trim nutpie's trace (%s: %s); it keeps every free variable (more memory)",
                        type(err).__name__, err)
            return built

    return trimmed


def _trim_expand(model, built, var_names, kwargs):  # type: ignore[no-untyped-def]
    """nutpie's ``_make_functions`` result with an expand function for ``var_names`` only."""
    n_free, n_expanded, logp_fn, expand_fn, init_fn, (names, slices, shapes) = built
    keep = [i for i, name in enumerate(names) if name in var_names]
    if not kwargs.get("join_expanded", True) or len(keep) == len(names) or not keep:
        return n_free, n_expanded, logp_fn, expand_fn, init_fn, (names, slices, shapes)
    import pytensor
    import pytensor.tensor as pt
    from pymc.pytensorf import compile as compile_pymc

    # the kept variables as functions of one flat vector of the free variables, as nutpie lays it out
    point = pt.TensorType("float64", shape=(n_free,))(name="_unconstrained_point")
    free = {model.rvs_to_values[rv].name: rv for rv in model.free_RVs}
    replace = {model.rvs_to_values[free[name]]: point[sl].reshape(shape).astype(free[name].dtype)
               for name, sl, shape in zip(names, slices, shapes) if name in free}
    wanted = {v.name: v for v in model.unobserved_value_vars}
    outs = pytensor.clone_replace([pt.as_tensor(wanted[names[i]]).ravel() for i in keep], replace)
    with model:
        new_expand = compile_pymc((point,), [pt.concatenate(outs)], mode=kwargs.get("mode"))
    new_slices, start = [], 0
    for i in keep:
        length = slices[i].stop - slices[i].start
        new_slices.append(slice(start, start + length))
        start += length
    info = ([names[i] for i in keep], new_slices, [shapes[i] for i in keep])
    return n_free, start, logp_fn, new_expand, init_fn, info


# The two wrappers below do what nutpie's ``_make_c_logp_func`` / ``_make_c_expand_func`` do
# (same C signatures, same return codes) with the shared data read from the user-data record
# by generated code, so that nothing in them is a per-process Python object and numba may
# cache them.

_LOGP_SRC = """
def logp_wrapper(dim, x_, out_, logp_, user_data_):
    if dim != {n_dim}:
        return -1
    try:
        x = numba.carray(x_, ({n_dim},))
        out = numba.carray(out_, ({n_dim},))
        logp = numba.carray(logp_, ())
{unpack}
        logp_val, grad = inner(x{args})
        logp[()] = logp_val
        out[...] = grad
        if not np.all(np.isfinite(out)):
            return 3
        if not np.isfinite(logp_val):
            return 4
    except Exception:  # noqa: BLE001
        return 1
    return 0
"""

_EXPAND_SRC = """
def expand_wrapper(dim, expanded, x_, out_, user_data_):
    if dim != {n_dim}:
        return -1
    if expanded != {n_expanded}:
        return -1
    try:
        x = numba.carray(x_, ({n_dim},))
        out = numba.carray(out_, ({n_expanded},))
{unpack}
        (values,) = inner(x{args})
        out[...] = values
    except Exception:  # noqa: BLE001
        return -2
    return 0
"""


def _cached_logp_wrapper(n_dim, logp_fn, user_data, shared_logp, shared_data):  # type: ignore[no-untyped-def]
    import numba

    c_sig = numba.types.int64(
        numba.types.uint64, numba.types.CPointer(numba.types.double), numba.types.CPointer(numba.types.double),
        numba.types.CPointer(numba.types.double), numba.types.voidptr,
    )
    return _wrapper(_LOGP_SRC, "logp_wrapper", {"n_dim": n_dim}, logp_fn, user_data, shared_logp, shared_data), c_sig


def _cached_expand_wrapper(n_dim, n_expanded, expand_fn, user_data, shared_vars, shared_data):  # type: ignore[no-untyped-def]
    import numba

    c_sig = numba.types.int64(
        numba.types.uint64, numba.types.uint64, numba.types.CPointer(numba.types.double),
        numba.types.CPointer(numba.types.double), numba.types.voidptr,
    )
    fields = {"n_dim": n_dim, "n_expanded": n_expanded}
    return _wrapper(_EXPAND_SRC, "expand_wrapper", fields, expand_fn, user_data, shared_vars, shared_data), c_sig


def _wrapper(template, name, fields, inner, user_data, shared_names, shared_data):  # type: ignore[no-untyped-def]
    """The wrapper's Python function, compiled from source and registered with PyTensor's numba cache."""
    import numba
    import nutpie.compile_pymc as ncp
    from pytensor.link.numba.cache import CACHED_SRC_FUNCTIONS, compile_numba_function_src

    unpack, env = [], {}
    if shared_names:
        unpack.append("        shared = numba.carray(user_data_, (), record_dtype)['shared']")
    for i, var in enumerate(shared_names):
        shape = "".join(f"int(shared['shape'][{var!r}][{j}]), " for j in range(shared_data[var].ndim))
        unpack.append(f"        a{i} = numba.carray(address_as_void_pointer(shared['data'][{var!r}][()]), "
                      f"({shape}), dtype{i})")
        env[f"dtype{i}"] = np.dtype(shared_data[var].dtype)
    args = "".join(f", a{i}" for i in range(len(shared_names)))
    src = template.format(unpack="\n".join(unpack), args=args, **fields)
    inner_key = CACHED_SRC_FUNCTIONS.get(getattr(inner, "py_func", None))
    if inner_key is None:  # PyTensor did not cache the wrapped function: a key that is never found again
        log.debug("PyTensor gave no cache key for the function nutpie wraps; its wrapper is compiled afresh")
        inner_key = uuid.uuid4().hex
    key = hashlib.sha256("\n".join([WRAPPER_VERSION, src, inner_key, str(user_data.dtype),
                                    repr(sorted((k, str(v)) for k, v in env.items()))]).encode()).hexdigest()
    env |= {"__name__": __name__, "numba": numba, "np": np, "inner": inner, "record_dtype": user_data.dtype,
            "address_as_void_pointer": ncp.address_as_void_pointer}
    return compile_numba_function_src(src, name, env, cache_key=key)
