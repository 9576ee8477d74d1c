"""The getting-started page runs top to bottom, as a notebook runs it, so the docs cannot drift from the code.

Every fenced ``python`` block of ``docs/getting_started.md`` (and of ``docs/api.md``, which has none today: it is
all generated reference) is executed in order in one namespace, in an empty folder. A block that ends in an
expression has that expression shown the way Jupyter shows it: ``_repr_html_`` when the object has one, else its
``repr``. The blocks are run exactly as users read them; only the demo's size is smaller (a hidden setup, as a
notebook's first cell might: the spec's sampling table asks for 2 chains x 150 draws after 150 tuning steps
instead of the demo's 2 x 2000 after 1000), which changes how long the fit takes, not which code runs.

The fit the page makes is then reused to check what a notebook user sees on the way (issue 21): the compile
status line, the person-LOO progress bar, the extrapolation warning and the prior-predictive message.
"""

from __future__ import annotations

import ast
import logging
import re
import warnings
from pathlib import Path
from typing import Any

import pytest

import hierchoice
import hierchoice.demo

DOCS = Path(__file__).resolve().parents[1] / "docs"
#: a fenced block whose info string is exactly "python" (bash and eval-rst blocks are not run)
_BLOCK = re.compile(r"^```python\n(.*?)^```", re.S | re.M)


def python_blocks(page: Path) -> list[str]:
    return _BLOCK.findall(page.read_text(encoding="utf-8"))


def run_cell(source: str, namespace: dict[str, Any]) -> Any:
    """Run one block like a notebook cell; return the shown value of a trailing expression (None if none)."""
    tree = ast.parse(source)
    last = tree.body[-1] if tree.body and isinstance(tree.body[-1], ast.Expr) else None
    body = ast.Module(body=tree.body[:-1] if last else tree.body, type_ignores=[])
    exec(compile(body, "<docs block>", "exec"), namespace)
    if last is None:
        return None
    value = eval(compile(ast.Expression(last.value), "<docs block>", "eval"), namespace)
    if hasattr(value, "_repr_html_"):
        shown = value._repr_html_()
        assert isinstance(shown, str) and shown, f"{type(value).__name__}._repr_html_ returned {shown!r}"
    repr(value)
    return value


@pytest.fixture(scope="module")
def page(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """The getting-started page run in an empty folder; its namespace, shown values and standard error."""
    import contextlib
    import io
    import os

    folder = tmp_path_factory.mktemp("getting_started")
    old_cwd, old_sampling = os.getcwd(), hierchoice.demo.DEMO_SAMPLING
    hierchoice.demo.DEMO_SAMPLING = {"chains": 2, "draws": 150, "tune": 150}  # the hidden setup (see above)
    namespace: dict[str, Any] = {"__name__": "__docs__"}
    shown, err = [], io.StringIO()
    try:
        os.chdir(folder)
        with contextlib.redirect_stderr(err):
            for source in python_blocks(DOCS / "getting_started.md"):
                shown.append(run_cell(source, namespace))
    finally:
        os.chdir(old_cwd)
        hierchoice.demo.DEMO_SAMPLING = old_sampling
    return {"ns": namespace, "shown": shown, "stderr": err.getvalue(), "folder": folder}


def test_getting_started_runs_top_to_bottom(page: dict[str, Any]) -> None:
    # the page's promises, checked on what its blocks made
    folder = page["folder"]
    assert (folder / "hierchoice-demo" / "harbourline.csv").exists()
    assert (folder / "results" / "report.html").exists()
    ns = page["ns"]
    assert ns["exit_code"] in (0, 1) and isinstance(ns["diagnostics"], dict)
    change = page["shown"][-2].set_index("alternative")  # compare_shares(result, market, fare_cut)
    # shares sum to 1 in both markets, so the mean changes sum to 0; the fare is a negative (lognormal) taste, so
    # cutting ferry A's fare raises its logit probability for every person and draw (own-price effect of the logit)
    assert abs(change["mean"].sum()) < 1e-9
    assert change.loc["ferry_a", "mean"] > 0 and change.loc["ferry_a", "eti_low"] > 0
    assert len(python_blocks(DOCS / "getting_started.md")) == len(page["shown"]) >= 9


def test_api_page_blocks_run(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # docs/api.md is mostly generated reference (eval-rst blocks); its python blocks run in order, in an empty folder
    monkeypatch.chdir(tmp_path)
    namespace: dict[str, Any] = {}
    blocks = python_blocks(DOCS / "api.md")
    assert blocks  # the notebook example
    for source in blocks:
        run_cell(source, namespace)
    # the checks saved into a new folder, then the report written into the same folder (both hierchoice's own)
    assert (tmp_path / "results" / "diagnostics.json").is_file() and (tmp_path / "results" / "report.html").is_file()


def test_compile_is_announced_with_its_time(page: dict[str, Any]) -> None:
    # nutpie's compile (the default backend) took 8-15 s with nothing on screen before (issue 21)
    err = page["stderr"]
    if page["ns"]["result"].info["backend"] == "nutpie":
        assert "compiling the model for nutpie (numba)…" in err
        assert re.search(r"compiling the model for nutpie \(numba\): done in \d+\.\d s", err), err[-2000:]
    else:
        assert re.search(r"compiling the model for PyMC's NUTS \(PyTensor\): compiled, chains started in", err)
    assert "_BackgroundSampler" not in err


def test_person_loo_and_compare_show_progress(page: dict[str, Any], capsys: pytest.CaptureFixture[str]) -> None:
    result = page["ns"]["result"]
    hierchoice.person_loo(result, n_sim=10, max_draws=20, progressbar=True)
    err = capsys.readouterr().err
    # not a terminal here: whole lines, the last one complete
    assert "person LOO: [" in err and "20/20 posterior draws" in err
    hierchoice.person_loo(result, n_sim=10, max_draws=20)  # default: progress in interactive use only
    assert capsys.readouterr().err == ""
    hierchoice.compare_models({"a": result, "b": result}, level="person", n_sim=10, max_draws=20, progressbar=True)
    err = capsys.readouterr().err
    assert "person LOO of 'a': [" in err and "person LOO of 'b': [" in err


def test_extrapolation_is_a_warning(page: dict[str, Any]) -> None:
    # a fare far above the design's range: the note used to go to the logger, where a notebook does not show it
    ns = page["ns"]
    far = ns["market"].assign(fare=[50.0, 5.0, None])
    with pytest.warns(hierchoice.HierchoiceWarning, match="extrapolat"):
        table = hierchoice.predict_shares(ns["result"], far)
    assert [r.kind for r in table.attrs["warnings"]] == ["extrapolation"]
    with warnings.catch_warnings():
        warnings.simplefilter("error", hierchoice.HierchoiceWarning)
        hierchoice.predict_shares(ns["result"], ns["market"])  # inside the range: no warning


def test_prior_predictive_names_the_users_attributes(page: dict[str, Any], caplog: pytest.LogCaptureFixture,
                                                     capsys: pytest.CaptureFixture[str]) -> None:
    panel = page["ns"]["panel"]
    with caplog.at_level(logging.INFO):
        hierchoice.prior_predictive(panel, draws=20, progressbar=True)
    err = capsys.readouterr().err
    assert f"prior predictive: 20 draws of the tastes for {', '.join(panel.attributes)}" in err
    # PyMC's own line lists its internal variables ("Sampling: [person_z, ...]"); it is held back now
    assert not [r for r in caplog.records if r.getMessage().startswith("Sampling:")]
