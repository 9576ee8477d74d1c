"""Held-out calibration (bands with a stated false-alarm rate) and the ``hierchoice holdout`` command.

The band test draws outcomes from known probabilities (no fit); the command test runs one real holdout fit
(module-scoped) on a small invented panel that the model describes exactly, so its held-out calibration must
lie within the bands.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

import hierchoice as hc
from hierchoice._io import MARKER
from hierchoice.cli import main
from hierchoice.diagnostics.calibration import band_z, calibration_bands, calibration_check
from hierchoice.exceptions import SpecError


def _table(p: np.ndarray, y: np.ndarray, bins: int = 10) -> pd.DataFrame:
    """A reliability table built here, independently of predictive.reliability (same binning rule)."""
    idx = np.minimum((p * bins).astype(int), bins - 1)
    rows = []
    for b in range(bins):
        sel = idx == b
        if sel.any():
            rows.append({"bin_lower": b / bins, "bin_upper": (b + 1) / bins, "n": int(sel.sum()),
                         "mean_predicted": p[sel].mean(), "observed": y[sel].mean(),
                         # variance of a sum of independent Bernoulli outcomes: sum p(1-p) (Poisson binomial)
                         "se": np.sqrt(np.sum(p[sel] * (1 - p[sel]))) / sel.sum()})
    return pd.DataFrame(rows)


def test_band_is_the_bonferroni_normal_quantile() -> None:
    # standard normal table (from memory): z_0.9995 = 3.2905, z_0.995 = 2.5758
    assert band_z(10, 0.01) == pytest.approx(3.2905, abs=1e-4)
    assert band_z(1, 0.01) == pytest.approx(2.5758, abs=1e-4)


def test_calibrated_predictions_raise_few_false_alarms_and_overconfident_ones_are_caught() -> None:
    rng = np.random.default_rng(0)
    alarms = 0
    caught = 0
    reps = 1500
    for _ in range(reps):
        p = rng.beta(0.7, 1.4, size=1500)
        y = (rng.random(p.size) < p).astype(float)
        alarms += calibration_check(_table(p, y)).verdict != "pass"
        # negative control: the same outcomes predicted too extremely (log-odds doubled)
        extreme = 1 / (1 + np.exp(-2 * np.log(p / (1 - p))))
        caught += calibration_check(_table(extreme, y)).verdict != "pass"
    # stated false-alarm rate 1 % per table: with 1500 tables the count is Binomial(1500, <= 0.01), whose
    # 99.9 % quantile is 27 (scipy.stats.binom.ppf(0.999, 1500, 0.01)); anything above means bands too narrow
    assert alarms <= 27
    assert caught >= 0.99 * reps


def test_in_sample_tables_are_not_graded() -> None:
    p = np.linspace(0.01, 0.99, 500)
    with pytest.raises(SpecError, match="not graded"):
        calibration_check(_table(p, (p > 0.5).astype(float)), in_sample=True)


def test_bins_without_enough_expected_counts_are_not_graded() -> None:
    bands = calibration_bands(_table(np.array([0.01, 0.02, 0.5, 0.5]), np.array([1.0, 1.0, 0.0, 1.0])))
    assert not bands["graded"].any() and not bands["outside"].any()
    assert calibration_check(_table(np.array([0.01, 0.5]), np.array([1.0, 0.0]))).verdict == "warn"


# --------------------------------------------------------------------------- the command, on a real fit


@pytest.fixture(scope="module")
def holdout_run(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """150 invented persons x 10 tasks, 3 held out each; the mixed model only (it is the true model)."""
    attrs = [hc.SimAttribute("x1", levels=np.linspace(-1.5, 1.5, 7).tolist(), mean=0.5, sd=1.0),
             hc.SimAttribute("x2", levels=np.linspace(-1.5, 1.5, 7).tolist(), mean=-1.0, sd=0.5)]
    sim = hc.simulate_panel(attrs, n_persons=150, n_tasks=10, seed=21)
    root = tmp_path_factory.mktemp("holdout")
    data, spec = root / "panel.csv", root / "panel.toml"
    sim.data.to_csv(data, index=False)
    spec.write_text(hc.Spec.from_dict(sim.spec).to_toml(), encoding="utf-8")
    out = root / "results"
    code = main(["holdout", str(data), "--spec", str(spec), "--out", str(out), "--tasks", "3", "--no-fixed",
                 "--draws", "300", "--tune", "300", "--chains", "2", "--seed", "4", "--quiet"])
    return {"code": code, "out": out, "data": data, "spec": spec, "root": root}


def test_holdout_command_writes_its_files(holdout_run: dict[str, Any]) -> None:
    out = holdout_run["out"]
    assert holdout_run["code"] == 0
    for name in ("holdout.json", "holdout_tasks.csv", "holdout_reliability.png"):
        assert (out / name).is_file(), name
    marker = json.loads((out / MARKER).read_text())
    assert {"holdout.json", "holdout_tasks.csv", "holdout_reliability.png"} <= set(marker["entries"])
    h = json.loads((out / "holdout.json").read_text())
    table = {r["model"]: r for r in h["table"]}
    assert set(table) == {"mixed", "chance"} and table["mixed"]["n_tasks"] == 450  # 3 x 150
    assert table["mixed"]["hit_rate"] > table["chance"]["hit_rate"] + 0.1
    assert table["mixed"]["mean_lpd"] > table["chance"]["mean_lpd"]
    tasks = pd.read_csv(out / "holdout_tasks.csv")
    assert len(tasks) == 450 and set(tasks["task"]) == {8, 9, 10}  # each person's last three tasks


def test_held_out_calibration_of_the_true_model_lies_within_its_bands(holdout_run: dict[str, Any]) -> None:
    # the model is the one that made the data, so a bin outside its band happens in <= 1 % of runs
    h = json.loads((holdout_run["out"] / "holdout.json").read_text())
    check = h["checks"][0]
    assert check["check"] == "calibration" and check["verdict"] == "pass", check
    assert check["threshold"] == pytest.approx(band_z(sum(r["graded"] for r in h["reliability"])))
    assert sum(r["n"] for r in h["reliability"]) == 450 * 3  # every available alternative of every held-out task


def test_holdout_refuses_a_folder_of_the_users_before_fitting(holdout_run: dict[str, Any],
                                                              capsys: pytest.CaptureFixture[str]) -> None:
    mine = holdout_run["root"] / "mine"
    mine.mkdir()
    (mine / "notes.txt").write_text("keep me")
    code = main(["holdout", str(holdout_run["data"]), "--spec", str(holdout_run["spec"]), "--out", str(mine)])
    assert code == 2 and "not written by hierchoice" in capsys.readouterr().err
    assert sorted(p.name for p in mine.iterdir()) == ["notes.txt"]


def test_the_report_shows_the_holdout_table(holdout_run: dict[str, Any], monkeypatch: pytest.MonkeyPatch) -> None:
    from hierchoice.report.sections import _holdout_section

    page = _holdout_section(Path(holdout_run["out"]))
    assert "Held-out tasks" in page and "mean log predictive density" in page and "data:image/png" in page
    assert "No holdout validation" in _holdout_section(holdout_run["root"])
