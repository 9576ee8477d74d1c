"""Compiling a model for nutpie with a trace of the requested variables only.

nutpie (``nutpie.compile_pymc_model``) compiles the model's log-density and the
function that expands a draw into the stored variables with PyTensor's numba
backend, then wraps each in a C-callable numba ``cfunc`` so that its Rust sampler
can call it without Python. nutpie stores every free variable with each draw, whatever
``var_names`` says. For a panel model that includes the (person, attribute)
deviations, so memory grew with persons x draws even when no person draws are
wanted (B3 at 4 x 1000 draws: 1.6 GB). :func:`_trim_expand` rebuilds the expand
function for the requested variables only.

This replaces a private nutpie function for the length of one call; if nutpie's
internals are not what this expects, :func:`compile_nutpie` falls back to
nutpie's own compile and says so (a :class:`~hierchoice.exceptions.HierchoiceWarning`).

Compiling takes seconds (8-15 s for the demo's model): :func:`compile_nutpie` says so on a status line and, when
it ends, how long it took. In a notebook nutpie shows its sampling progress as an HTML display of its sampler
object, whose text form (what a text frontend or a notebook saved as text shows) is the object's default
``<nutpie.sample._BackgroundSampler at 0x...>``; :func:`text_progress` gives it the progress as text instead
for the length of one sampling call.
"""

from __future__ import annotations

import importlib
import re
import warnings
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from typing import Any

from .._backend import load_backend
from .._display import status
from ..exceptions import HierchoiceWarning

__all__ = ["compile_nutpie", "text_progress"]


def compile_nutpie(model: Any, var_names: Sequence[str], *, progressbar: bool = True) -> Any:
    """``nutpie.compile_pymc_model(model)`` whose trace holds ``var_names`` only.

    With ``progressbar`` a status line says that the model is compiling and, at the end, how long it took.
    """
    with status("compiling the model for nutpie (numba)", enabled=progressbar):
        return _compile(model, var_names)


def _compile(model: Any, var_names: Sequence[str]) -> Any:
    import nutpie
    import nutpie.compile_pymc as ncp

    builder = getattr(ncp, "_make_functions", None)
    if builder is None:
        warnings.warn("nutpie's internals changed: the trace keeps every free variable (more memory)",
                      HierchoiceWarning, stacklevel=2)
        return nutpie.compile_pymc_model(model, var_names=list(var_names))
    ncp._make_functions = _trimming(builder, var_names)
    try:
        return nutpie.compile_pymc_model(model, var_names=list(var_names))
    finally:
        ncp._make_functions = builder


def _trimming(builder: Any, var_names: Sequence[str]) -> Any:
    def trimmed(model, **kwargs):  # type: ignore[no-untyped-def]
        built = builder(model, **kwargs)
        try:
            return _trim_expand(model, built, var_names, kwargs)
        except Exception as err:  # nutpie's layout is not what this expects: keep nutpie's own
            warnings.warn(f"could not trim nutpie's trace ({type(err).__name__}: {err}); it keeps every free "
                          "variable (more memory)", HierchoiceWarning, stacklevel=2)
            return built

    return trimmed


def _trim_expand(model, built, var_names, kwargs):  # type: ignore[no-untyped-def]
    """nutpie's ``_make_functions`` result with an expand function for ``var_names`` only."""
    n_free, n_expanded, logp_fn, expand_fn, init_fn, (names, slices, shapes) = built
    keep = [i for i, name in enumerate(names) if name in var_names]
    if not kwargs.get("join_expanded", True) or len(keep) == len(names) or not keep:
        return n_free, n_expanded, logp_fn, expand_fn, init_fn, (names, slices, shapes)
    load_backend()
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


def _widget_text(sampler: Any) -> str:
    """nutpie's progress display as one line of text (from the HTML it renders)."""
    page = str(getattr(sampler, "_html", "") or "")
    bar = re.search(r'id="total-progress-bar"\s*max="(\d+)"\s*value="(\d+)"', page)
    head = re.sub(r"<[^>]+>", " ", page.split("<progress", 1)[0])
    words = " ".join(head.split()).replace("Sampler Progress", "").strip()
    draws = f"draws {bar.group(2)}/{bar.group(1)}; " if bar else ""
    return f"nutpie sampling: {draws}{words}" if words or draws else "nutpie sampling"


@contextmanager
def text_progress() -> Iterator[None]:
    """While the block runs, nutpie's notebook progress display reads as its progress in text (see above)."""
    try:
        cls = importlib.import_module("nutpie.sample")._BackgroundSampler
    except (ImportError, AttributeError):  # another nutpie: leave its display as it is
        yield
        return
    had = "__repr__" in vars(cls)
    old = vars(cls).get("__repr__")
    cls.__repr__ = _widget_text
    try:
        yield
    finally:
        if had:
            cls.__repr__ = old
        else:
            del cls.__repr__
