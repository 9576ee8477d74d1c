"""Every command of ``hierchoice`` run as a user runs it: through ``main([...])`` (or a new process), with the exit
code, the printed messages and the files asserted.

Commands covered elsewhere are not repeated here: ``validate`` (tests/test_cli_validate.py), ``holdout``
(tests/test_holdout_command.py), ``calibrate`` (tests/test_calibrate.py::test_calibrate_command_writes_the_folder),
the refusals of foreign output folders (tests/test_output_folders.py).

The data are invented with known tastes (``hierchoice.simulate``); the references are independent of the package:
the logit formula (McFadden 1974) computed here with numpy over the posterior draws, and ``numpy.quantile`` for the
equal-tailed intervals. Fits are shared through module-scoped fixtures; the long ones are marked slow.
"""

from __future__ import annotations

import contextlib
import io
import json
import re
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

import hierchoice as hc
from hierchoice._io import MARKER
from hierchoice._version import __version__
from hierchoice.cli import EXIT_BAD_INPUT, main

LEVELS = np.linspace(-1.5, 1.5, 7).tolist()  # the design's range of x1 and x2: -1.5 to 1.5


def _run(argv: list[str]) -> tuple[int, str, str]:
    """``main(argv)`` with its stdout and stderr captured (usable in module-scoped fixtures, unlike capsys)."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return code, out.getvalue(), err.getvalue()


def _write_panel(root: Path, attrs: list[hc.SimAttribute], **kwargs: Any) -> tuple[Path, Path]:
    sim = hc.simulate_panel(attrs, **kwargs)
    data, spec = root / "panel.csv", root / "panel.toml"
    sim.data.to_csv(data, index=False)
    spec.write_text(hc.Spec.from_dict(sim.spec).to_toml(), encoding="utf-8")
    return data, spec


@pytest.fixture(scope="module")
def short(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """40 invented persons x 6 tasks, two normal tastes; three deliberately short fits (2 chains x 40 draws):
    two with the same seed, one with another."""
    root = tmp_path_factory.mktemp("cli")
    attrs = [hc.SimAttribute("x1", levels=LEVELS, mean=1.0, sd=0.5),
             hc.SimAttribute("x2", levels=LEVELS, mean=-0.5, sd=0.3)]
    data, spec = _write_panel(root, attrs, n_persons=40, n_tasks=6, seed=11)
    common = [str(data), "--spec", str(spec), "--draws", "40", "--tune", "40", "--chains", "2", "--quiet"]
    runs = {}
    for name, extra in (("a", ["--seed", "3", "--backend", "nutpie"]), ("b", ["--seed", "3", "--backend", "nutpie"]),
                        ("c", ["--seed", "4", "--backend", "nutpie"])):
        runs[name] = _run(["fit", *common, "--out", str(root / name), *extra])
    market = root / "market.csv"
    # x1 = 3 for alternative a lies outside the design (-1.5 to 1.5): the extrapolation warning
    market.write_text("option,x1,x2\na,3.0,0.5\nb,0.0,-1.0\nc,-1.0,1.0\n", encoding="utf-8")
    return {"root": root, "data": data, "spec": spec, "runs": runs, "market": market}


# --------------------------------------------------------------------------- fit


def test_fit_prints_the_population_table_and_writes_the_folder(short: dict[str, Any]) -> None:
    code, out, _ = short["runs"]["a"]
    assert code == 0
    folder = short["root"] / "a"
    assert f"results written to {folder}/ (check convergence before reading them: hierchoice check {folder})" in out
    # the population table: one line per (quantity, attribute) of the fit's own population table
    for quantity, attribute in (("population_mean", "x1"), ("population_mean", "x2"), ("population_sd", "x1"),
                                ("population_sd", "x2")):
        assert re.search(rf"^\s*{quantity}\s+{attribute}\s", out, re.M), (quantity, attribute)
    assert "40 persons, 240 tasks" in out  # the panel summary and the fit's repr
    info = hc.load_fit(folder).info
    assert (info["backend"], info["seed"], info["chains"], info["draws"], info["tune"]) == ("nutpie", 3, 2, 40, 40)
    assert not info["approximate"] and "CAUTION" not in out


def test_the_same_seed_gives_the_same_posterior(short: dict[str, Any]) -> None:
    a, b, c = (hc.load_fit(short["root"] / n) for n in "abc")
    assert all(short["runs"][n][0] == 0 for n in "abc")
    for var in ("taste_mean", "taste_sd", "person_taste"):
        np.testing.assert_array_equal(a.posterior[var].values, b.posterior[var].values)
    # negative control: another seed gives other draws, so the equality above is not vacuous
    assert not np.array_equal(a.posterior["taste_mean"].values, c.posterior["taste_mean"].values)
    assert c.info["seed"] == 4


@pytest.mark.slow
def test_fit_backend_pymc_with_a_seed(short: dict[str, Any]) -> None:
    folders = [short["root"] / f"pymc{i}" for i in (1, 2)]
    for folder in folders:
        code, out, _ = _run(["fit", str(short["data"]), "--spec", str(short["spec"]), "--out", str(folder),
                             "--backend", "pymc", "--draws", "30", "--tune", "30", "--chains", "2", "--seed", "5",
                             "--quiet"])
        assert code == 0 and "backend pymc" in out
    one, two = (hc.load_fit(f) for f in folders)
    assert one.info["backend"] == "pymc"
    np.testing.assert_array_equal(one.posterior["taste_mean"].values, two.posterior["taste_mean"].values)


def test_fit_option_clashes_are_clean_errors_before_any_fit(short: dict[str, Any]) -> None:
    root = short["root"]
    base = [str(short["data"]), "--spec", str(short["spec"]), "--quiet"]
    code, _, err = _run(["fit", *base, "--out", str(root / "clash"), "--approximate", "--method", "nuts"])
    assert code == EXIT_BAD_INPUT
    assert "--approximate means --method advi; it cannot be combined with --method nuts" in err
    code, _, err = _run(["fit", *base, "--out", str(root / "batch"), "--method", "nuts", "--person-batch", "10"])
    assert code == EXIT_BAD_INPUT
    assert "person_batch applies to method='advi' only" in err
    assert not (root / "clash").exists() and not (root / "batch").exists()  # nothing half-written
    with pytest.raises(SystemExit) as exc:  # argparse: a seed below 0 is refused as the line is read
        main(["fit", *base, "--out", str(root / "neg"), "--seed", "-1"])
    assert exc.value.code == 2


# --------------------------------------------------------------------------- check


def test_check_of_a_short_fit_exits_1_as_diagnostics_json_says(short: dict[str, Any]) -> None:
    folder = short["root"] / "a"
    code, out, _ = _run(["check", str(folder)])
    report = json.loads((folder / "diagnostics.json").read_text(encoding="utf-8"))
    failed = [c for c in report["checks"] if c["verdict"] == "fail"]
    # 2 chains x 40 draws cannot reach a bulk ESS of 400 (common practice: Vehtari et al. 2021, Bayesian Analysis 16)
    assert any(c["check"] == "ess_bulk" and c["verdict"] == "fail" for c in report["checks"])
    assert code == report["exit_code"] == 1 and report["verdict"] == "fail"
    assert f"{len(failed)} convergence check{'s' if len(failed) != 1 else ''} FAILED" in out
    assert "convergence verdict: FAIL" in out
    assert f"wrote {folder / 'diagnostics.json'} and the diagnostic plots" in out
    for name in report["plots"].values():
        assert (folder / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


# --------------------------------------------------------------------------- shares and report


def _panel_share_draws(result: hc.ChoiceFit, market: pd.DataFrame) -> np.ndarray:
    """Shares per posterior draw over the fitted persons, by the logit formula (McFadden 1974) in numpy:
    S_j = mean_n exp(x_j b_n) / sum_i exp(x_i b_n). Returns (draws, alternatives)."""
    beta = result.posterior["person_taste"].transpose("chain", "draw", "person", "attribute")
    beta = beta.sel(attribute=["x1", "x2"]).values  # (C, D, N, K)
    X = market[["x1", "x2"]].to_numpy(float)  # (J, K)
    u = np.einsum("cdnk,jk->cdnj", beta, X)
    p = np.exp(u - u.max(axis=-1, keepdims=True))
    p /= p.sum(axis=-1, keepdims=True)
    return p.mean(axis=2).reshape(-1, X.shape[0])


def test_shares_panel_prob_and_warning(short: dict[str, Any]) -> None:
    folder, market = short["root"] / "a", short["market"]
    out80, out90 = short["root"] / "shares80.csv", short["root"] / "shares90.csv"
    code, out, err = _run(["shares", str(folder), "--market", str(market), "--persons", "panel", "--prob", "0.8",
                           "--out", str(out80)])
    assert code == 0
    assert f"wrote {out80}" in out and "alternative" in out
    assert err.count("warning: x1 = 3 for 'a' is outside the range of the design (-1.5 to 1.5)") == 1
    table = pd.read_csv(out80)
    assert list(table["alternative"]) == ["a", "b", "c"] and (table["prob"] == 0.8).all()
    # the reference: 80 draws, none thinned away (max_draws 1000)
    draws = _panel_share_draws(hc.load_fit(folder), pd.read_csv(market))
    np.testing.assert_allclose(draws.sum(axis=1), 1.0, rtol=1e-12)
    np.testing.assert_allclose(table["mean"], draws.mean(axis=0), rtol=1e-9)
    np.testing.assert_allclose(table["eti_low"], np.quantile(draws, 0.1, axis=0), rtol=1e-9)
    np.testing.assert_allclose(table["eti_high"], np.quantile(draws, 0.9, axis=0), rtol=1e-9)
    assert table["mean"].sum() == pytest.approx(1.0, abs=1e-12)  # the mean of shares that sum to 1 per draw
    # the default probability is 0.9: wider equal-tailed intervals than at 0.8
    assert _run(["shares", str(folder), "--market", str(market), "--persons", "panel", "--out", str(out90)])[0] == 0
    wide = pd.read_csv(out90)
    assert (wide["prob"] == 0.9).all()
    np.testing.assert_allclose(wide["eti_low"], np.quantile(draws, 0.05, axis=0), rtol=1e-9)
    assert (wide["eti_low"] < table["eti_low"]).all() and (wide["eti_high"] > table["eti_high"]).all()


def test_shares_population_sums_to_one_and_bad_prob_is_refused(short: dict[str, Any]) -> None:
    folder, market = short["root"] / "a", short["market"]
    code, out, err = _run(["shares", str(folder), "--market", str(market)])
    assert code == 0 and "outside the range of the design" in err
    code, _, err = _run(["shares", str(folder), "--market", str(market), "--prob", "1.5"])
    assert code == EXIT_BAD_INPUT and "error:" in err and "1.5" in err


def test_report_with_market_and_prob(short: dict[str, Any]) -> None:
    folder, market = short["root"] / "a", short["market"]
    code, out, _ = _run(["report", str(folder), "--market", str(market), "--prob", "0.8"])
    assert code == 0
    assert out.strip() == f"report: {folder / 'report.html'}"
    page = (folder / "report.html").read_text(encoding="utf-8")
    assert "80 % HDI" in page and "90 % HDI" not in page
    result = hc.load_fit(folder)
    shares = pd.read_csv(folder / "shares.csv")
    assert set(shares["persons"]) == {"population", "panel"} and (shares["prob"] == 0.8).all()
    for _, group in shares.groupby("persons"):
        assert group["mean"].sum() == pytest.approx(1.0, abs=1e-9)  # shares sum to 1 in every draw
    panel = shares[shares["persons"] == "panel"]
    draws = _panel_share_draws(result, pd.read_csv(market))
    np.testing.assert_allclose(panel["mean"], draws.mean(axis=0), rtol=1e-9)
    np.testing.assert_allclose(panel["eti_high"], np.quantile(draws, 0.9, axis=0), rtol=1e-9)
    pop = pd.read_csv(folder / "population_tastes.csv")
    row = pop[(pop["quantity"] == "population_mean") & (pop["attribute"] == "x1")].iloc[0]
    x1 = result.posterior["taste_mean"].sel(attribute="x1").values.ravel()
    assert row["prob"] == 0.8
    assert (row["eti_low"], row["eti_high"]) == pytest.approx(tuple(np.quantile(x1, [0.1, 0.9])), rel=1e-9)
    assert "scenario" in page and "outside the range of the design" in page


def test_report_of_a_missing_folder_is_a_clean_error(tmp_path: Path) -> None:
    code, _, err = _run(["report", str(tmp_path / "none")])
    assert code == EXIT_BAD_INPUT and "does not exist" in err


# --------------------------------------------------------------------------- --version, in a new process


def test_version_in_a_new_process() -> None:
    run = subprocess.run([sys.executable, "-m", "hierchoice", "--version"], capture_output=True, text=True,
                         timeout=120)
    assert run.returncode == 0, run.stderr
    assert run.stdout.strip() == f"hierchoice {__version__}"
    assert __version__ and __version__[0].isdigit()


# --------------------------------------------------------------------------- slow: the long paths


@pytest.mark.slow
def test_check_passes_on_a_fit_long_enough(tmp_path: Path) -> None:
    # one well-identified random taste (SD 1 over 8 tasks) and a fixed one; 2 chains x 1000 draws pass every check
    attrs = [hc.SimAttribute("x1", levels=LEVELS, mean=1.0, sd=1.0),
             hc.SimAttribute("x2", levels=LEVELS, taste="fixed", mean=-0.5)]
    data, spec = _write_panel(tmp_path, attrs, n_persons=60, n_tasks=8, seed=12)
    folder = tmp_path / "res"
    code, _, _ = _run(["fit", str(data), "--spec", str(spec), "--out", str(folder), "--draws", "1000",
                       "--tune", "500", "--chains", "2", "--seed", "3", "--quiet"])
    assert code == 0
    code, out, _ = _run(["check", str(folder)])
    report = json.loads((folder / "diagnostics.json").read_text(encoding="utf-8"))
    assert code == report["exit_code"] == 0
    assert not [c for c in report["checks"] if c["verdict"] == "fail"]
    assert "every convergence check passed" in out or "no convergence check failed" in out


@pytest.mark.slow
def test_fit_approximate_with_person_batch(short: dict[str, Any]) -> None:
    folder = short["root"] / "advi"
    code, out, _ = _run(["fit", str(short["data"]), "--spec", str(short["spec"]), "--out", str(folder),
                         "--approximate", "--person-batch", "20", "--draws", "200", "--seed", "1", "--quiet"])
    assert code == 0
    assert "CAUTION: This is an APPROXIMATE fit (mean-field ADVI)" in out
    result = hc.load_fit(folder)
    assert result.approximate and result.info["person_batch"] == 20 and result.info["method"].startswith("ADVI")
    # the population means near the truth (1.0, -0.5): within 4 approximate SDs, doubled because mean-field ADVI
    # understates SDs (Blei et al. 2017, JASA 112); the simulated truth is the reference
    mean = result.posterior["taste_mean"].mean(("chain", "draw")).values
    sd = result.posterior["taste_mean"].std(("chain", "draw")).values
    assert (np.abs(mean - np.array([1.0, -0.5])) <= 8 * sd).all(), (mean, sd)
    # check: an approximate fit never passes (the exact_method check fails), and the exit code says so
    code, out, _ = _run(["check", str(folder)])
    report = json.loads((folder / "diagnostics.json").read_text(encoding="utf-8"))
    assert code == report["exit_code"] == 1
    assert any(c["check"] == "exact_method" and c["verdict"] == "fail" for c in report["checks"])
    # --method advi is the same as --approximate
    code, _, _ = _run(["fit", str(short["data"]), "--spec", str(short["spec"]), "--out", str(folder),
                       "--method", "advi", "--person-batch", "20", "--draws", "200", "--seed", "1", "--quiet"])
    assert code == 0
    np.testing.assert_array_equal(hc.load_fit(folder).posterior["taste_mean"].values,
                                  result.posterior["taste_mean"].values)


@pytest.mark.slow
def test_fit_method_blocked(short: dict[str, Any]) -> None:
    folder = short["root"] / "blocked"
    code, out, _ = _run(["fit", str(short["data"]), "--spec", str(short["spec"]), "--out", str(folder),
                         "--method", "blocked", "--draws", "300", "--tune", "200", "--chains", "2", "--seed", "2",
                         "--quiet"])
    assert code == 0, out
    result = hc.load_fit(folder)
    assert "blocked" in result.info["method"].lower()
    assert result.posterior.sizes["draw"] == 300 and result.posterior.sizes["chain"] == 2


@pytest.mark.slow
def test_demo_quick(tmp_path: Path) -> None:
    out_dir = tmp_path / "demo"
    code, out, _ = _run(["demo", "--quick", "--persons", "20", "--seed", "3", "--out", str(out_dir)])
    assert code == 0
    assert out.startswith("--quick: a smoke run with very few draws.")
    for step in ("1/4 validated", "2/4 fitting", "3/4 checking", "4/4 writing the report"):
        assert step in out
    assert f"report: {out_dir / 'results' / 'report.html'}" in out
    report = json.loads((out_dir / "results" / "diagnostics.json").read_text(encoding="utf-8"))
    assert report["exit_code"] == (1 if "FAILED" in out else 0)
    result = hc.load_fit(out_dir / "results")
    assert (result.posterior.sizes["draw"], result.info["tune"]) == (60, 60)
    assert sorted(p.name for p in out_dir.iterdir()) == sorted(
        [MARKER, "harbourline.csv", "harbourline.toml", "harbourline_market.csv", "results"])
