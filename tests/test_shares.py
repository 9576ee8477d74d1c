"""Market shares: the closed-form logit, logit properties, elasticities, scenarios and the market table."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from test_tastes import fake_fit, small_panel

import hierchoice as hc
from hierchoice import DataError, FitError, SimAttribute, SpecError
from hierchoice.analysis.shares import (
    compare_shares,
    elasticities,
    market_design,
    predict_shares,
    sensitivity,
    share_draws,
)

BETA = {"price": -0.8, "time": -0.05}
ASC = {"asc:a": 0.5, "asc:c": -0.3}  # reference "b" (simulate_panel: the first alternative without a constant)


def _fixed_fit(spread: float = 0.0) -> hc.ChoiceFit:
    attrs = [SimAttribute("price", levels=[1.0, 2.0, 3.0, 4.0], taste="fixed", mean=BETA["price"]),
             SimAttribute("time", levels=[10.0, 20.0, 30.0], taste="fixed", mean=BETA["time"])]
    panel = small_panel(attrs, constants={"a": 0.5, "c": -0.3}, model={"price": "price"})
    return fake_fit(panel, BETA | ASC, spread=spread, draws=50)


def _random_fit(**kwargs: Any) -> hc.ChoiceFit:
    attrs = [SimAttribute("price", levels=[1.0, 2.0, 3.0, 4.0], taste="lognormal", mean=0.0, sd=0.4,
                          sign="negative"),
             SimAttribute("quality", levels=[0.0, 1.0, 2.0], taste="lognormal", mean=-0.5, sd=0.5,
                          sign="positive")]
    panel = small_panel(attrs, model={"price": "price"})
    return fake_fit(panel, {"price": 0.0, "quality": -0.5}, {"price": 0.4, "quality": 0.5}, spread=0.05,
                    **kwargs)


MARKET = pd.DataFrame({"option": ["a", "b", "c"], "price": [2.0, 3.0, 1.5], "time": [20.0, 10.0, 30.0]})


def _logit(v: np.ndarray) -> np.ndarray:
    e = np.exp(v - v.max())
    return e / e.sum()


@pytest.mark.parametrize("persons", ["population", "panel"])
def test_fixed_tastes_give_the_closed_form_logit(persons: str) -> None:
    fit = _fixed_fit()
    table = predict_shares(fit, MARKET, persons=persons).set_index("alternative")
    # McFadden (1974): P_j = exp(V_j) / sum_i exp(V_i), V_j = beta . x_j + asc_j, by hand in numpy
    v = (BETA["price"] * MARKET["price"].to_numpy() + BETA["time"] * MARKET["time"].to_numpy()
         + np.array([ASC["asc:a"], 0.0, ASC["asc:c"]]))
    expected = _logit(v)
    assert np.allclose(table.loc[["a", "b", "c"], "median"], expected, atol=1e-12)
    assert np.allclose(table["hdi_high"] - table["hdi_low"], 0.0, atol=1e-12)
    assert table.attrs["persons"] == persons and table.attrs["warnings"] == []


def test_shares_per_draw_follow_each_draw_of_the_tastes() -> None:
    fit = _fixed_fit(spread=0.1)
    draws = share_draws(fit, MARKET, persons="panel", max_draws=None)
    mu = fit.posterior["taste_mean"]
    for c, d in ((0, 0), (1, 7)):
        m = mu.isel(chain=c, draw=d)
        v = (float(m.sel(attribute="price")) * MARKET["price"].to_numpy()
             + float(m.sel(attribute="time")) * MARKET["time"].to_numpy()
             + np.array([float(m.sel(attribute="asc:a")), 0.0, float(m.sel(attribute="asc:c"))]))
        assert np.allclose(draws.isel(chain=c, draw=d).values, _logit(v))


@pytest.mark.parametrize("persons", ["population", "panel"])
def test_shares_sum_to_one_per_draw(persons: str) -> None:
    fit = _random_fit()
    market = pd.DataFrame({"option": ["a", "b", "c"], "price": [2.0, 3.0, 1.0], "quality": [1.0, 2.0, 0.0]})
    draws = share_draws(fit, market, persons=persons, n_persons=200)
    assert np.allclose(draws.sum("alternative"), 1.0)
    assert ((draws > 0) & (draws < 1)).all()


def test_a_dominated_alternative_loses_share() -> None:
    # Every person's price taste is negative and quality taste positive (lognormal), so a higher price
    # and a lower quality lower that alternative's utility for everyone: its logit share must fall in
    # every draw, and every other share must rise (a property of the logit, McFadden 1974).
    fit = _random_fit()
    base = pd.DataFrame({"option": ["a", "b", "c"], "price": [2.0, 3.0, 1.0], "quality": [1.0, 2.0, 0.0]})
    worse = base.copy()
    worse.loc[0, ["price", "quality"]] = [2.5, 0.5]
    s0 = share_draws(fit, base, n_persons=300, seed=4)
    s1 = share_draws(fit, worse, n_persons=300, seed=4)
    assert (s1.sel(alternative="a") < s0.sel(alternative="a")).all()
    assert (s1.sel(alternative=["b", "c"]) > s0.sel(alternative=["b", "c"])).all()
    diff = compare_shares(fit, base, worse, n_persons=300, seed=4).set_index("alternative")
    assert diff.loc["a", "hdi_high"] < 0 < diff.loc["b", "hdi_low"]
    # within one market: an alternative worse in both attributes than another has the smaller share
    dominated = pd.DataFrame({"option": ["a", "b"], "price": [2.0, 2.5], "quality": [1.5, 1.0]})
    s = share_draws(fit, dominated, persons="panel")
    assert (s.sel(alternative="b") < s.sel(alternative="a")).all()


def test_fixed_taste_elasticities_equal_the_textbook_formula() -> None:
    fit = _fixed_fit()
    table = elasticities(fit, MARKET, attribute="price").set_index(["changed", "share_of"])
    v = (BETA["price"] * MARKET["price"].to_numpy() + BETA["time"] * MARKET["time"].to_numpy()
         + np.array([ASC["asc:a"], 0.0, ASC["asc:c"]]))
    p = _logit(v)
    x = MARKET["price"].to_numpy()
    labels = ["a", "b", "c"]
    # Train (2009), Discrete Choice Methods with Simulation, 2nd ed., ch. 3:
    # own E = beta x_i (1 - P_i), cross E = -beta x_j P_j
    for j, changed in enumerate(labels):
        for i, share_of in enumerate(labels):
            expected = BETA["price"] * x[j] * (1 - p[j]) if i == j else -BETA["price"] * x[j] * p[j]
            row = table.loc[(changed, share_of)]
            assert row["median"] == pytest.approx(expected, rel=1e-9)
            assert row["kind"] == ("own" if i == j else "cross")


def test_mixed_logit_elasticities_match_finite_differences() -> None:
    fit = _random_fit(draws=20)
    market = pd.DataFrame({"option": ["a", "b", "c"], "price": [2.0, 3.0, 1.0], "quality": [1.0, 2.0, 0.0]})
    table = elasticities(fit, market, attribute="price", n_persons=400, seed=2).set_index(["changed", "share_of"])
    h = 1e-5
    up, down = market.copy(), market.copy()
    up.loc[1, "price"] *= 1 + h
    down.loc[1, "price"] *= 1 - h
    s_up = share_draws(fit, up, n_persons=400, seed=2)
    s_down = share_draws(fit, down, n_persons=400, seed=2)
    s0 = share_draws(fit, market, n_persons=400, seed=2)
    numeric = ((s_up - s_down) / (2 * h) / s0).mean(("chain", "draw"))
    for share_of in ("a", "b", "c"):
        assert table.loc[("b", share_of), "mean"] == pytest.approx(float(numeric.sel(alternative=share_of)),
                                                                   rel=1e-4)


def test_categorical_levels_are_coded_like_the_panel() -> None:
    sim = hc.ferry_scenario(n_persons=20, seed=2)
    market = pd.DataFrame({"option": ["ferry_a", "ferry_b", "none"], "fare": [3.0, 4.0, np.nan],
                           "crossing_time": [20, 25, np.nan], "departures_per_hour": [2, 4, np.nan],
                           "deck": ["open", "lounge", np.nan]})
    for coding, base_value in (("dummy", 0.0), ("effects", -1.0)):
        sim.spec["attributes"]["deck"]["coding"] = coding
        panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
        fit = fake_fit(panel, {n: 0.1 for n in panel.attributes}, draws=2)
        X = market_design(fit, market)
        assert X.sel(alternative="ferry_a", attribute="deck:covered") == base_value
        assert X.sel(alternative="ferry_a", attribute="deck:lounge") == base_value
        assert X.sel(alternative="ferry_b", attribute="deck:lounge") == 1.0
        assert X.sel(alternative="ferry_b", attribute="deck:covered") == 0.0
        # constants by label, the opt-out's blank attributes are 0
        assert X.sel(alternative="ferry_b", attribute="asc:ferry_b") == 1.0
        assert (X.sel(alternative="none") == 0.0).all()
        # the panel codes the same level the same way
        k = panel.attributes.index("deck:lounge")
        rows = sim.data[sim.data["option"] != "none"].reset_index(drop=True)
        coded = panel.to_long()
        coded = coded[coded["option"] != "none"].reset_index(drop=True)
        assert set(coded.loc[rows["deck"] == "open", panel.attributes[k]]) == {base_value}


@pytest.mark.parametrize(
    ("change", "pattern"),
    [
        (lambda m: m.drop(columns="time"), r"no column 'time'"),
        (lambda m: m.rename(columns={"option": "alt"}), r"column naming the alternatives: 'option'"),
        (lambda m: m.assign(option=["a", "a", "c"]), r"lists 'a' more than once"),
        (lambda m: m.assign(option=["a", "b", "zz"]), r"'zz'.*not fitted alternatives"),
        (lambda m: m.assign(price=[2.0, "cheap", 1.0]), r"'price' is not numeric.*'b'"),
        (lambda m: m.assign(time=[20.0, np.nan, 30.0]), r"'time' is empty for alternative\(s\) 'b'"),
        (lambda m: m.iloc[:1], r"one alternative"),
        (lambda m: m.iloc[:0], r"empty"),
    ],
)
def test_bad_market_tables_name_the_problem(change: Any, pattern: str) -> None:
    fit, market = _fixed_fit(), change(MARKET.copy())
    with pytest.raises(DataError, match=pattern):
        market_design(fit, market)


def test_unknown_level_and_extrapolation() -> None:
    sim = hc.ferry_scenario(n_persons=20, seed=2)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    fit = fake_fit(panel, {n: 0.1 for n in panel.attributes} | {"fare": -1.0}, draws=2)
    market = pd.DataFrame({"option": ["ferry_a", "ferry_b"], "fare": [3.0, 9.0], "crossing_time": [20, 25],
                           "departures_per_hour": [2, 4], "deck": ["open", "sundeck"]})
    with pytest.raises(DataError, match=r"'deck' has level\(s\) 'sundeck'.*covered"):
        market_design(fit, market)
    table = predict_shares(fit, market.assign(deck=["open", "lounge"]), n_persons=10)
    (record,) = table.attrs["warnings"]
    assert record.kind == "extrapolation" and record.where == "ferry_b:fare" and "2 to 7" in record.message


def test_sensitivity_is_monotone_and_passes_through_the_market() -> None:
    fit = _random_fit()
    market = pd.DataFrame({"option": ["a", "b", "c"], "price": [2.0, 3.0, 1.0], "quality": [1.0, 2.0, 0.0]})
    curve = sensitivity(fit, market, alternative="a", attribute="price", values=[1.0, 2.0, 3.0, 4.0],
                        n_persons=300, seed=1)
    own = curve[curve["alternative"] == "a"]["median"].to_numpy()
    assert (np.diff(own) < 0).all()
    at_market = curve[(curve["value"] == 2.0)].set_index("alternative")["median"]
    direct = predict_shares(fit, market, n_persons=300, seed=1).set_index("alternative")["median"]
    assert np.allclose(at_market.loc[direct.index], direct)
    # default values: the design's range, 11 points
    assert sorted(set(sensitivity(fit, market, alternative="a", attribute="price", n_persons=20)["value"])) == \
        pytest.approx(np.linspace(1.0, 4.0, 11).tolist())
    with pytest.raises(DataError, match="'zz' is not a row"):
        sensitivity(fit, market, alternative="zz", attribute="price")
    with pytest.raises(SpecError, match="'colour' is not an attribute"):
        sensitivity(fit, market, alternative="a", attribute="colour")


def test_compare_shares_identical_and_entering_alternative() -> None:
    fit = _random_fit()
    market = pd.DataFrame({"option": ["a", "b", "c"], "price": [2.0, 3.0, 1.0], "quality": [1.0, 2.0, 0.0]})
    same = compare_shares(fit, market, market, n_persons=100)
    assert np.allclose(same[["mean", "hdi_low", "hdi_high"]], 0.0)
    entry = compare_shares(fit, market.iloc[:2], market, n_persons=100).set_index("alternative")
    assert entry.loc["c", "base"] == 0.0 and entry.loc["c", "hdi_low"] > 0
    assert entry.loc["a", "hdi_high"] < 0
    assert entry["mean"].sum() == pytest.approx(0.0, abs=1e-12)


def test_person_modes_and_errors() -> None:
    fit = _random_fit(person_draws=False)
    market = pd.DataFrame({"option": ["a", "b"], "price": [2.0, 3.0], "quality": [1.0, 2.0]})
    assert len(predict_shares(fit, market, n_persons=50)) == 2  # population mode needs no person draws
    with pytest.raises(FitError, match="persons = \"population\" needs no person draws"):
        predict_shares(fit, market, persons="panel")
    with pytest.raises(SpecError, match="persons = 'everyone'"):
        predict_shares(fit, market, persons="everyone")
    sim = hc.ferry_scenario(n_persons=20, seed=2)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    ferry = fake_fit(panel, {n: 0.1 for n in panel.attributes}, draws=2)
    ferry_market = pd.DataFrame({"option": ["ferry_a", "none"], "fare": [3.0, None], "crossing_time": [20, None],
                                 "departures_per_hour": [2, None], "deck": ["open", None]})
    with pytest.raises(SpecError, match="numeric attribute"):
        elasticities(ferry, ferry_market, attribute="deck")


def test_shares_command_reads_a_folder_and_writes_csv(tmp_path: Any) -> None:
    fit = _fixed_fit()
    folder = hc.save_fit(fit, tmp_path / "results")
    market_csv = tmp_path / "market.csv"
    MARKET.to_csv(market_csv, index=False)
    out = tmp_path / "shares.csv"
    from hierchoice.cli import main

    assert main(["shares", str(folder), "--market", str(market_csv), "--out", str(out)]) == 0
    table = hc.predict_shares(hc.load_fit(folder), market_csv)
    back = pd.read_csv(out)
    assert list(back["alternative"]) == ["a", "b", "c"]
    assert np.allclose(back["median"], table["median"]) and back["median"].sum() == pytest.approx(1.0)
