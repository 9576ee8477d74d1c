"""The notebook path (issue 21): a fit that shows its own convergence verdict, the checks as an object, fit objects
and folders taken alike, tables and dicts taken where files were, the ecosystem's argument names, clear errors.

One short fit (simulated ferry panel, 40 persons x 6 tasks, 2 chains x 20 draws, PyMC's NUTS on one core) is shared
by the module; it is too short to converge on purpose.
"""

from __future__ import annotations

import copy
import io
from pathlib import Path

import arviz as az
import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
import pytest

import hierchoice as hc
from hierchoice.diagnostics import overview as diagnose_module
from hierchoice.diagnostics.checks import convergence_checks, format_check_value, overall_verdict
from hierchoice.diagnostics.folder import check_folder, format_verdict
from hierchoice.inference.results import ChoiceFit

SHORT = {"draws": 20, "tune": 20, "chains": 2, "cores": 1, "backend": "pymc", "progressbar": False}

MARKET = {"option": ["ferry_a", "ferry_b", "none"], "fare": [5.0, 7.0, None], "crossing_time": [30.0, 20.0, None],
          "departures_per_hour": [2.0, 4.0, None], "deck": ["open", "lounge", None]}


@pytest.fixture(scope="module")
def sim() -> hc.SimulatedPanel:
    return hc.ferry_scenario(40, n_tasks=6, seed=4, correlated=False)


@pytest.fixture(scope="module")
def short(sim: hc.SimulatedPanel) -> ChoiceFit:
    """fit(DataFrame, dict): the table and the spec as a notebook user has them."""
    return hc.fit(sim.data, copy.deepcopy(sim.spec), random_seed=5, **SHORT)


@pytest.fixture(scope="module")
def saved(short: ChoiceFit, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return hc.save_fit(short, tmp_path_factory.mktemp("nb") / "saved")


# --------------------------------------------------------------------------- the fit's display


def test_display_of_a_non_converged_fit_leads_with_its_failing_verdict(short: ChoiceFit) -> None:
    """2 chains x 20 draws cannot pass: ArviZ caps an ESS at N log10 N = 40 x 1.6 = 64 draws (from memory), below
    the fail line of 100 (common practice; Vehtari et al. 2021 for the ESS). The old display showed only the
    population table, so these asserts fail on it."""
    text = repr(short)
    assert text.splitlines()[0] == "ChoiceFit: convergence FAIL"
    assert "R-hat" in text and "bulk ESS" in text and "tail ESS" in text and "divergent" in text
    html = short._repr_html_()
    assert html.index("NOT converged") < html.index("<table")  # the verdict comes before the population table
    # the verdict is the checks' own, computed independently here
    assert overall_verdict(convergence_checks(short)) == "fail" == short.diagnostics.verdict
    # the worst R-hat shown is ArviZ's rank-normalised split R-hat of the population parameters, read directly
    rhat = az.rhat(short.idata, var_names=["taste_mean", "taste_sd"], method="rank")
    worst = max(float(rhat[v].max()) for v in rhat.data_vars)
    assert f"worst R-hat {format_check_value('rhat', worst, 1.01)} " in text


def test_diagnostics_are_computed_once(short: ChoiceFit, monkeypatch: pytest.MonkeyPatch) -> None:
    calls = []
    real = diagnose_module.convergence_checks

    def counted(*args, **kwargs):  # type: ignore[no-untyped-def]
        calls.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(diagnose_module, "convergence_checks", counted)
    fresh = ChoiceFit(idata=short.idata, panel=short.panel, spec=short.spec, layout=short.layout, info=short.info)
    repr(fresh), fresh._repr_html_(), hc.diagnose(fresh), repr(fresh)
    assert len(calls) == 1
    assert hc.diagnose(fresh) is fresh.diagnostics


# --------------------------------------------------------------------------- the checks as an object


def test_diagnose_is_what_check_folder_writes(short: ChoiceFit, saved: Path) -> None:
    before = sorted(p.name for p in saved.iterdir())
    diag = hc.diagnose(saved)
    assert sorted(p.name for p in saved.iterdir()) == before  # nothing written until asked
    assert diag.verdict == "fail" and diag.exit_code == 1
    table = diag.table
    assert list(table["verdict"]) == [c.verdict for c in convergence_checks(short)]
    assert len(repr(diag)) < 1000 and repr(diag).startswith(f"Diagnostics of {saved}: convergence FAIL")
    assert "Convergence FAIL" in diag._repr_html_()
    fig = diag.plot_trace()
    assert fig.number not in plt.get_fignums()  # closed from pyplot: a notebook draws it once
    assert fig.axes

    # the folder job writes those checks: a fit in memory written into its own results folder here
    report, code = check_folder(short, out=saved)
    assert code == 1 and (saved / "diagnostics.json").is_file() and (saved / "trace.png").is_file()
    fresh = diag.to_dict()  # the checks of the fit loaded from the folder, in memory
    assert [c["verdict"] for c in report["checks"]] == [c["verdict"] for c in fresh["checks"]]
    # the folder keeps person tastes as float32 (docs/reporting.md, format 2): the same to float32's rounding
    _assert_close(report["loo"], fresh["loo"])
    _assert_close(report["predictive"]["hit_rate"], fresh["predictive"]["hit_rate"])
    assert format_verdict(report).splitlines()[2:8] == format_verdict(fresh).splitlines()[2:8]
    with pytest.raises(hc.ArchiveError, match="diagnose"):
        check_folder(short)  # a fit without a folder to write into


def test_package_plots_are_closed_from_pyplot(short: ChoiceFit) -> None:
    from hierchoice.diagnostics.plots import plot_energy, plot_rank

    for fig in (plot_rank(short.idata), plot_energy(short.idata)):
        assert fig.number not in plt.get_fignums()


# --------------------------------------------------------------------------- inputs taken alike


def test_fit_of_a_table_equals_fit_of_its_panel(sim: hc.SimulatedPanel, short: ChoiceFit) -> None:
    spec = copy.deepcopy(sim.spec)
    again = hc.fit(hc.load_panel(sim.data, spec), spec, seed=5, **SHORT)  # seed: the older name of random_seed
    for name in ("taste_mean", "taste_sd", "person_taste"):
        np.testing.assert_array_equal(again.posterior[name].values, short.posterior[name].values)
    with pytest.raises(hc.SpecError, match="random_seed"):
        hc.fit(sim.data, spec, random_seed=1, seed=2, **SHORT)


def test_analysis_and_report_take_a_fit_or_its_folder(short: ChoiceFit, saved: Path, tmp_path: Path) -> None:
    frame = pd.DataFrame(MARKET)
    csv = tmp_path / "market.csv"
    frame.to_csv(csv, index=False)
    pairs = [
        (hc.population_tastes(short), hc.population_tastes(saved)),
        (hc.person_tastes(short, hdi_prob=0.8), hc.person_tastes(saved, prob=0.8)),
        (hc.population_wtp(short, random_seed=3), hc.population_wtp(str(saved), seed=3)),
        (hc.predict_shares(short, MARKET), hc.predict_shares(saved, frame)),
        (hc.predict_shares(short, list(frame.to_dict("records"))), hc.predict_shares(saved, csv)),
        (short.population(hdi_prob=0.8), hc.population_summary(saved, prob=0.8)),
    ]
    for from_fit, from_folder in pairs:
        pd.testing.assert_frame_equal(from_fit, from_folder)
    # one population table: the fit's own is population_tastes
    pd.testing.assert_frame_equal(short.population(), hc.population_tastes(short))
    assert {"hdi_low", "hdi_high", "eti_low", "eti_high"} <= set(short.population().columns)

    # the report of the fit object, then of its folder (into the same folder, whose diagnostics.json of this fit
    # both reuse; without a market to keep the test short: predict_shares above read the dict market)
    names = ("population_tastes.csv", "person_tastes.csv", "wtp.csv", "person_wtp.csv")
    page = hc.write_report(short, out=saved)
    assert "Convergence: NOT converged" in page.read_text(encoding="utf-8")
    from_fit = {name: (saved / name).read_text() for name in names}
    for name in names:
        (saved / name).unlink()
    page = hc.write_report(saved)
    assert "Convergence: NOT converged" in page.read_text(encoding="utf-8")
    for name in names:  # the folder's person tastes are float32: equal to its rounding, not bit for bit
        pd.testing.assert_frame_equal(pd.read_csv(saved / name), pd.read_csv(io.StringIO(from_fit[name])), rtol=1e-5)


def test_bad_inputs_give_project_errors(sim: hc.SimulatedPanel, short: ChoiceFit) -> None:
    with pytest.raises(hc.FitError, match="not its .idata"):
        hc.population_tastes(short.idata)
    with pytest.raises(hc.FitError, match="diagnose takes a fit"):
        hc.diagnose(42)
    with pytest.raises(hc.DataError, match="A market is a DataFrame"):
        hc.predict_shares(short, 42)
    with pytest.raises(hc.DataError, match="equally long"):
        hc.predict_shares(short, {"option": ["ferry_a", "none"], "fare": [1.0]})
    with pytest.raises(hc.DataError, match="ChoicePanel"):
        hc.fit(short.idata)
    with pytest.raises(hc.SpecError, match="needs a spec"):
        hc.fit(sim.data)
    with pytest.raises(hc.ArchiveError, match="out="):
        hc.write_report(short)
    with pytest.raises(hc.SpecError, match="hdi_prob"):
        hc.population_tastes(short, hdi_prob=0.8, prob=0.5)


def test_spec_from_keywords_is_checked_when_made(sim: hc.SimulatedPanel) -> None:
    table = copy.deepcopy(sim.spec)
    assert hc.Spec(**table) == hc.Spec.from_dict(table)
    bad = copy.deepcopy(table)
    bad["attributes"]["fare"]["taste"] = "lognormall"
    with pytest.raises(hc.SpecError, match="lognormal"):
        hc.Spec(**bad)
    bad = copy.deepcopy(table)
    bad["sampling"]["draws"] = -5
    with pytest.raises(hc.SpecError, match="sampling.draws"):
        hc.Spec(**bad)
    with pytest.raises(hc.SpecError, match="columns"):
        hc.Spec(columns="respondent", attributes=table["attributes"])
    bad = copy.deepcopy(table)
    bad["model"]["price"] = "deck"  # a categorical attribute cannot be the price
    with pytest.raises(hc.SpecError, match="numeric"):
        hc.Spec(**bad)


def test_ecosystem_argument_names_everywhere(short: ChoiceFit) -> None:
    """``random_seed`` (PyMC's name) and ``hdi_prob`` (ArviZ's) work where a seed or an interval is taken, the older
    ``seed`` / ``prob`` stay as aliases, and both names with different values are refused."""
    from hierchoice.diagnostics.predictive import ppc_shares

    attrs = [hc.SimAttribute("x", levels=[0.0, 1.0, 2.0], mean=1.0, sd=0.5)]
    a = hc.simulate_panel(attrs, n_persons=20, n_tasks=4, random_seed=7).data
    b = hc.simulate_panel(attrs, n_persons=20, n_tasks=4, seed=7).data
    c = hc.simulate_panel(attrs, n_persons=20, n_tasks=4, random_seed=8).data
    pd.testing.assert_frame_equal(a, b)
    assert not a.equals(c)  # the seed is used at all
    new = ppc_shares(short, draws=20, hdi_prob=0.8, random_seed=3)
    old = ppc_shares(short, draws=20, prob=0.8, seed=3)
    pd.testing.assert_frame_equal(new, old)
    assert not new.equals(ppc_shares(short, draws=20, hdi_prob=0.5, random_seed=3))
    with pytest.raises(hc.SpecError, match="random_seed"):
        hc.simulate_panel(attrs, n_persons=20, n_tasks=4, random_seed=1, seed=2)


def _assert_close(a: object, b: object, rtol: float = 1e-5) -> None:
    """Nested dicts / lists equal, numbers to ``rtol`` (float32 person tastes in a results folder: 2^-24 relative
    rounding, far below this tolerance; a real difference between the two routes is far above it)."""
    if isinstance(a, dict):
        assert isinstance(b, dict) and a.keys() == b.keys(), (a, b)
        for k in a:
            _assert_close(a[k], b[k], rtol)
    elif isinstance(a, (list, tuple)):
        assert isinstance(b, (list, tuple)) and len(a) == len(b)
        for x, y in zip(a, b):
            _assert_close(x, y, rtol)
    elif isinstance(a, (int, float)) and not isinstance(a, bool):
        assert b == pytest.approx(a, rel=rtol, abs=1e-9), (a, b)
    else:
        assert a == b, (a, b)
