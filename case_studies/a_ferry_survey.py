# %% [markdown]
# # Case study A: the Harbourline ferry survey, from table to report
#
# **The scenario (invented).** *Harbourline* is a made-up commuter ferry across a city harbour. Before choosing a
# timetable and fares, its planners ask commuters to answer 8–12 choice tasks each. Every task shows two possible
# ferry services, `ferry_a` and `ferry_b`, described by
#
# | attribute | levels |
# |---|---|
# | `fare` | 2 to 7 (currency units per crossing) |
# | `crossing_time` | 15 to 40 minutes |
# | `departures_per_hour` | 1, 2, 4 or 6 |
# | `deck` | open, covered, lounge |
#
# and a third option, `none`: keep the current commute (the **opt-out**). The planners want to know how much
# commuters value a shorter crossing and more frequent departures, in fare units, and what a fare cut on one
# service would do to its share.
#
# **The data are invented** by `hc.ferry_scenario`, hierchoice's simulator, so every estimate below can be held
# against the true value that generated it. In the simulation commuters differ: the fare taste is lognormal (it is
# negative for everyone, more so for some), the time and frequency tastes are normal, and the three random tastes
# are correlated.
#
# Run it from the repository root: `python case_studies/a_ferry_survey.py` (two to three minutes on two cores).
# `HIERCHOICE_CASE_SCALE=ci` runs a small, quick version whose numbers are not to be read;
# `HIERCHOICE_CASE_OUT` sets the output folder (default `case_studies/output`).

# %%
import os
from pathlib import Path

import pandas as pd

import hierchoice as hc
from hierchoice.diagnostics.folder import check_folder, format_verdict
from hierchoice.report.html import write_report
from hierchoice.analysis.shares import compare_shares, predict_shares
from hierchoice.analysis.tastes import population_tastes, taste_shrinkage
from hierchoice.analysis.wtp import population_wtp

SCALE = os.environ.get("HIERCHOICE_CASE_SCALE", "full")
if SCALE not in ("full", "ci"):
    raise SystemExit(f"HIERCHOICE_CASE_SCALE must be 'full' or 'ci', got {SCALE!r}")
OUT = Path(os.environ.get("HIERCHOICE_CASE_OUT", "case_studies/output")) / "a_ferry_survey"
RESPONDENTS = 300 if SCALE == "full" else 40
SAMPLING = {} if SCALE == "full" else dict(draws=100, tune=100)  # full: the spec's 2 chains x 1000 draws

# %% [markdown]
# ## 1. The survey table and its spec
#
# The simulator returns a long table (one row per alternative per task) and the spec that reads it. We write both
# to disk, as they would arrive from a survey platform, and work from the files.

# %%
sim = hc.ferry_scenario(n_persons=RESPONDENTS, seed=7)
OUT.mkdir(parents=True, exist_ok=True)
data_path = OUT / "harbourline.csv"
spec_path = OUT / "harbourline.toml"
sim.data.to_csv(data_path, index=False)
spec_path.write_text(hc.Spec.from_dict(sim.spec).to_toml(), encoding="utf-8")
print(spec_path.read_text(encoding="utf-8"))

# %% [markdown]
# The spec says: `fare` has a lognormal taste with a negative sign (every commuter dislikes a higher fare);
# `crossing_time` and `departures_per_hour` have normal tastes; `deck` is dummy-coded against `open` with a fixed
# taste; each ferry has a constant against `none`; the random tastes are correlated; and `fare` is the price, so
# willingness-to-pay is in fare units.
#
# ## 2. Validate
#
# `load_panel` applies every rule of `docs/data.md` and says what it read, kept and filled. (The same from the
# shell: `hierchoice validate harbourline.csv --spec harbourline.toml`.)

# %%
panel = hc.load_panel(data_path, spec_path)
print(panel.summary)

# %% [markdown]
# The opt-out's attributes are blank in the table; the summary counts them as filled with 0, which is what the
# model needs (the opt-out's utility is 0).
#
# ## 3. Fit
#
# NUTS with the spec's sampling settings (the same seed gives the same posterior). The results folder is written
# atomically and can be reopened with `hc.load_fit`.

# %%
result = hc.fit(panel, progressbar=False, **SAMPLING)
results = result.save(OUT / "results")
print(f"{result!r}, {result.info['wall_seconds']:.0f} s -> {results}")

# %% [markdown]
# ## 4. Check, before reading anything
#
# The convergence verdict comes first: if it fails, no number below means anything yet. `check_folder` also
# computes the in-sample hit rate, posterior-predictive shares and PSIS-LOO, and writes `diagnostics.json` and the
# diagnostic plots into the folder (see `docs/diagnostics.md`).

# %%
diagnostics, exit_code = check_folder(results)
print(format_verdict(diagnostics))

# %% [markdown]
# ## 5. Population tastes, against the truth
#
# `population_mean` / `population_sd` are the parameters of each taste's distribution across commuters (for the
# lognormal fare taste: of the log of minus the coefficient). `median_across_people` is the coefficient of the
# median commuter. The last column is the value the simulation used.

# %%
tastes = population_tastes(result)
truth = {("population_mean", k): v for k, v in sim.truth["taste_mean"].items()}
truth |= {("population_sd", k): v for k, v in sim.truth["taste_sd"].items()}
shown = tastes[tastes["quantity"].isin(["population_mean", "population_sd"])].copy()
shown["truth"] = [truth.get((q, a)) for q, a in zip(shown["quantity"], shown["attribute"])]
print(shown[["quantity", "attribute", "scale", "median", "hdi_low", "hdi_high", "truth"]]
      .to_string(index=False, float_format=lambda v: f"{v:.3f}"))

# %% [markdown]
# How much does each commuter's own answers say about their tastes? `taste_shrinkage` compares the spread of the
# individual estimates with the population spread: near 0, individual estimates all sit at the population mean and
# should not be used to tell commuters apart.

# %%
print(taste_shrinkage(result).to_string(index=False, float_format=lambda v: f"{v:.2f}"))

# %% [markdown]
# ## 6. Willingness to pay for a shorter crossing and more departures
#
# WTP for one more unit of an attribute is `-beta_k / beta_fare`, in fare units. For `crossing_time` it is per
# minute and negative: commuters would have to be paid to accept a longer crossing, so minus 60 times it is the
# value of an hour saved. The truth column is the median of the same ratio over the simulated commuters' true tastes.

# %%
wtp = population_wtp(result)
true_taste = sim.truth["person_taste"]
true_wtp = {k: float((-true_taste[k] / true_taste["fare"]).median()) for k in ("crossing_time", "departures_per_hour")}
median_wtp = wtp.query("quantity == 'median_across_people' and attribute in ['crossing_time', 'departures_per_hour']")
median_wtp = median_wtp.assign(truth=median_wtp["attribute"].map(true_wtp))
print(median_wtp[["attribute", "unit", "median", "hdi_low", "hdi_high", "truth"]]
      .to_string(index=False, float_format=lambda v: f"{v:.3f}"))
per_minute = median_wtp.set_index("attribute").loc["crossing_time"]
print(f"\nvalue of an hour of crossing time saved (median commuter): {-60 * per_minute['median']:.2f} fare units "
      f"[{-60 * per_minute['hdi_high']:.2f}, {-60 * per_minute['hdi_low']:.2f}]")

# %% [markdown]
# ## 7. A fare cut: what would it do to the shares?
#
# The planners' base case and one change: `ferry_a`'s fare cut from 4.5 to 3.5. Both markets are evaluated on the
# same simulated commuters and posterior draws, so the interval is that of the *change* itself. Shares are those of
# the population the sample stands for (`persons="population"`).

# %%
base = pd.DataFrame({
    "option": ["ferry_a", "ferry_b", "none"],
    "fare": [4.5, 5.0, None],
    "crossing_time": [20, 15, None],
    "departures_per_hour": [4, 2, None],
    "deck": ["covered", "lounge", None],
})
fare_cut = base.assign(fare=[3.5, 5.0, None])
print(predict_shares(result, base)[["alternative", "median", "hdi_low", "hdi_high"]]
      .to_string(index=False, float_format=lambda v: f"{v:.3f}"))
change = compare_shares(result, base, fare_cut)
print("\nferry_a fare 4.5 -> 3.5, change in share:")
print(change[["alternative", "base", "scenario", "median", "hdi_low", "hdi_high"]]
      .to_string(index=False, float_format=lambda v: f"{v:.3f}"))

# %% [markdown]
# The `median` column is the change in share, with its interval: what `ferry_a` gains, it takes from `ferry_b` and
# from commuters who would otherwise keep their current commute (`none`). These are stated-preference shares: read
# them as the difference between the two scenarios, not as a forecast of ridership.
#
# ## 8. The report
#
# One self-contained HTML file (plots embedded, no links), with the CSV tables beside it, for the planners.

# %%
path = write_report(results, market=base)
print(f"report: {path}")
