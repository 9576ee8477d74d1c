# %% [markdown]
# # Case study B: habit or taste? State dependence in a tea purchase panel
#
# **The question.** A grocery panel records, for each household, which of three loose-leaf tea brands it bought on
# each shopping trip. Households that bought *Kettlebrook* last time buy it again more often than chance. Is that
# **habit** (having bought a brand makes buying it again more likely: *state dependence*), or do those households
# simply **like** Kettlebrook (*heterogeneity*)? The answer matters: a price promotion that wins a new buyer keeps
# paying off under habit, and not under taste.
#
# **The data are invented.** The brands *Kettlebrook*, *Morrow Leaf* and *Saltmarsh* and the panel are made up
# here, with numpy, so that the true size of the habit effect is known and the estimates can be checked against it.
# (hierchoice's own simulator, `hc.simulate_panel`, gives every person the same alternative-specific constants, and
# the point of this case study needs constants that differ between households, so the simulation is written out
# below. Each purchase is a logit draw made with `hc.simulate.draw_choices`.)
#
# **The trap.** A household's first recorded purchase is not a fresh start: it was shaped by the same tastes (and by
# purchases made before the panel began). A model that treats that first purchase as given and draws every
# household's brand preference from one population distribution, whatever it bought first, lets the lagged purchase
# stand in for the household's taste, and so **overstates state dependence** (Heckman 1981, "The incidental
# parameters problem and the problem of initial conditions in estimating a discrete time–discrete data stochastic
# process", in *Structural Analysis of Discrete Data with Econometric Applications*, MIT Press).
# The treatment of Wooldridge (2005, *Journal of Applied Econometrics* 20(1)) models the household's preferences
# *conditional on its first observed purchase*: hierchoice adds the first purchase as person covariates that shift
# the population means (`[dynamics] initial_conditions = true`; see `docs/model.md`).
#
# We fit both models to the same panel and compare the estimated habit effect with the truth.
#
# Run it from the repository root: `python case_studies/b_purchase_panel.py`. `HIERCHOICE_CASE_SCALE=ci` runs a
# small, quick version (its numbers are not to be read); `HIERCHOICE_CASE_OUT` sets the output folder.

# %%
import os
from pathlib import Path

import numpy as np
import pandas as pd

import hierchoice as hc
from hierchoice.diagnostics.folder import check_folder, format_verdict
from hierchoice.report.html import write_report
from hierchoice.analysis.tastes import population_tastes

SCALE = os.environ.get("HIERCHOICE_CASE_SCALE", "full")
if SCALE not in ("full", "ci"):
    raise SystemExit(f"HIERCHOICE_CASE_SCALE must be 'full' or 'ci', got {SCALE!r}")
OUT = Path(os.environ.get("HIERCHOICE_CASE_OUT", "case_studies/output")) / "b_purchase_panel"
HOUSEHOLDS, OCCASIONS = (600, 6) if SCALE == "full" else (40, 6)
SAMPLING = dict(draws=1000, tune=1000) if SCALE == "full" else dict(draws=100, tune=100)

# %% [markdown]
# ## The invented panel
#
# Each shopping trip offers the three brands at that week's shelf prices (per 100 g box; each brand has its own
# usual price, moved by ±10–20 % from week to week) and, now and then, on a promotional display. Households differ
# in how much they like each brand: their brand constants (relative to Kettlebrook) are drawn once, from a normal
# distribution, and kept for all their trips. Buying a brand raises its utility on the next trip by
# `TRUTH["habit"]` (the state dependence we want to recover). Before the panel starts recording, every household
# makes `BURN_IN` unrecorded purchases, so its first recorded purchase already carries both its tastes and its habit.
# The panel is short (six recorded trips per household at full scale), as household panels over a few months are:
# the fewer the trips, the less each household's own choices can separate its taste from its habit.

# %%
BRANDS = ["Kettlebrook", "Morrow Leaf", "Saltmarsh"]
USUAL_PRICE = np.array([3.2, 2.8, 3.6])              # per 100 g box
PRICE_FACTORS = np.array([0.8, 0.9, 1.0, 1.1, 1.2])  # this week's price / the usual price
TRUTH = {
    "price": -1.5,               # the same for every household (a fixed taste)
    "display": 0.6,              # on a promotional display (0/1)
    "asc_mean": np.array([0.2, -0.3]),   # Morrow Leaf, Saltmarsh against Kettlebrook
    "asc_sd": np.array([2.0, 2.0]),      # how much households differ in those preferences
    "habit": 0.8,                # lagged_choice: bought this brand on the previous trip
}
BURN_IN = 5


def simulate_tea_panel(households: int, occasions: int, *, seed: int = 11) -> pd.DataFrame:
    """A long table, one row per (household, trip, brand), of invented purchases with state dependence."""
    rng = np.random.default_rng(seed)
    n_j, n_t = len(BRANDS), BURN_IN + occasions
    asc = np.zeros((households, n_j))
    asc[:, 1:] = TRUTH["asc_mean"] + TRUTH["asc_sd"] * rng.standard_normal((households, n_j - 1))
    price = USUAL_PRICE * rng.choice(PRICE_FACTORS, size=(households, n_t, n_j))       # (H, T, J)
    display = (rng.random((households, n_t, n_j)) < 0.2).astype(float)                  # (H, T, J)
    utility = asc[:, None, :] + TRUTH["price"] * price + TRUTH["display"] * display   # (H, T, J)
    available = np.ones((households, n_j), dtype=bool)
    chosen = np.zeros((households, n_t), dtype=int)
    for t in range(n_t):
        u = utility[:, t]
        if t > 0:
            u = u + TRUTH["habit"] * np.eye(n_j)[chosen[:, t - 1]]
        chosen[:, t] = hc.simulate.draw_choices(u, available, rng)
    # keep the recorded trips only: the burn-in purchases happened before the panel began
    h, t, j = np.meshgrid(np.arange(households), np.arange(BURN_IN, n_t), np.arange(n_j), indexing="ij")
    h, t, j = h.ravel(), t.ravel(), j.ravel()
    return pd.DataFrame({
        "household": h + 1,
        "trip": t - BURN_IN + 1,
        "brand": np.asarray(BRANDS, dtype=object)[j],
        "bought": (chosen[h, t] == j).astype(int),
        "price": price[h, t, j].round(2),
        "display": display[h, t, j].astype(int),
    })


OUT.mkdir(parents=True, exist_ok=True)
purchases = simulate_tea_panel(HOUSEHOLDS, OCCASIONS)
purchases.to_csv(OUT / "tea_purchases.csv", index=False)
purchases.head(6)

# %% [markdown]
# ## Two specs that differ in one line
#
# Both models give every household its own brand constants (`[constants] taste = "normal"`: without that
# heterogeneity there is no initial-conditions problem) and add `lagged_choice`, 1 on the brand bought on the
# previous trip. Each household's first recorded trip has no recorded previous purchase, so it is dropped from the
# likelihood (`first_task = "drop"`); the summary counts it. The treated model adds `initial_conditions = true`:
# the brand of that first trip becomes the person covariates `first_choice:Morrow Leaf` and
# `first_choice:Saltmarsh`, which shift the population means of the brand constants (Wooldridge's household effect
# given its first purchase). `[covariates] shifts` limits the shift to the constants: by default person covariates
# shift every taste.

# %%
naive_spec = {
    "columns": {"person": "household", "task": "trip", "alternative": "brand", "chosen": "bought"},
    "attributes": {"price": {"taste": "fixed"}, "display": {"taste": "fixed"}},
    "constants": {"reference": "Kettlebrook", "taste": "normal"},
    "data": {"alternatives": BRANDS},
    "dynamics": {"lagged_choice": True, "first_task": "drop"},
    "model": {"price": "price"},
}
treated_spec = naive_spec | {
    "dynamics": naive_spec["dynamics"] | {"initial_conditions": True},
    # covariates.shifts applies to every person covariate, the initial-conditions ones included; this panel has no
    # covariate columns of its own, and the first purchase should shift the brand preferences only
    "covariates": {"columns": [], "shifts": ["asc:Morrow Leaf", "asc:Saltmarsh"]},
}

naive_panel = hc.load_panel(purchases, naive_spec)
treated_panel = hc.load_panel(purchases, treated_spec)
print(treated_panel.summary)

# %% [markdown]
# ## Fit both

# %%
fits = {}
for name, panel in (("naive", naive_panel), ("initial conditions", treated_panel)):
    fits[name] = hc.fit(panel, progressbar=False, **SAMPLING)
    print(f"{name}: {fits[name]!r}, {fits[name].info['wall_seconds']:.0f} s")

# %% [markdown]
# ## Is the sampler done?
#
# Both fits are saved and checked before anything is read from them. (`check_folder` also writes
# `diagnostics.json` and the diagnostic plots into each results folder.)

# %%
folders = {"naive": OUT / "naive", "initial conditions": OUT / "results"}
for name, result in fits.items():
    result.save(folders[name])
    verdict, code = check_folder(folders[name])
    print(f"--- {name}\n{format_verdict(verdict)}\n")

# %% [markdown]
# ## The habit effect: naive against treated, against the truth
#
# `population_mean` of `lagged_choice` is the state-dependence coefficient (a fixed taste: the same for every
# household). The naive model's estimate should sit above the true value; the treated one should cover it, or come
# much closer.

# %%
tables = {name: population_tastes(result, prob=0.9) for name, result in fits.items()}
rows = []
for name, table in tables.items():
    est = table.query("quantity == 'population_mean' and attribute == 'lagged_choice'").iloc[0]
    rows.append({"model": name, "median": est["median"], "eti_low": est["eti_low"], "eti_high": est["eti_high"]})
habit = pd.DataFrame(rows).set_index("model")
habit["truth"] = TRUTH["habit"]
print("state dependence (lagged_choice), posterior median and 90% equal-tailed interval:")
print(habit.to_string(float_format=lambda v: f"{v:.3f}"))
if SCALE == "full":
    naive_gap = habit.loc["naive", "median"] - TRUTH["habit"]
    treated_gap = habit.loc["initial conditions", "median"] - TRUTH["habit"]
    print(f"\nnaive overstates habit by {naive_gap:+.3f}; with initial conditions the gap is {treated_gap:+.3f}")
else:
    print("\n(ci scale: a smoke run with few households and draws; do not read these numbers)")

# %% [markdown]
# At full scale (600 households, 2 chains × 1000 draws, the seeds in this script) the naive model put the habit
# effect at 1.29 (90 % interval 1.16 to 1.43) against a true 0.8: it credits habit with a good part of what is
# really taste. With the initial-conditions treatment the estimate was 0.85 (0.73 to 0.97), covering the truth.
#
# The treated model also says *how* the first purchase relates to taste: the `covariate_effect` rows show how much
# higher the average preference for Morrow Leaf (or Saltmarsh) is among households whose first recorded purchase was
# that brand. That is the heterogeneity the naive model mistook for habit: its estimated spread of brand
# preferences (`population_sd` of the constants) is squeezed, because the lagged purchase already does their work.
# (In the treated model `population_sd` is the spread among households *with the same first purchase*, so it is
# expected to be below the simulation's 2.0.)

# %%
effects = tables["initial conditions"].query("quantity == 'covariate_effect'")
print(effects[["attribute", "other", "median", "eti_low", "eti_high"]].to_string(index=False))
spreads = pd.DataFrame({
    name: table.query("quantity == 'population_sd'").set_index("attribute")["median"]
    for name, table in tables.items()
}).assign(truth=dict(zip(["asc:Morrow Leaf", "asc:Saltmarsh"], TRUTH["asc_sd"])))
print("\npopulation SD of the brand constants (posterior medians):")
print(spreads.to_string(float_format=lambda v: f"{v:.2f}"))

# %% [markdown]
# ## The report
#
# The report of the treated fit, with a market for the next trip of households whose **previous purchase was
# Kettlebrook** (`lagged_choice` = 1 on Kettlebrook's row; a market needs a column for every model term).

# %%
market = pd.DataFrame({
    "brand": BRANDS,
    "price": USUAL_PRICE,
    "display": [0, 0, 0],
    "lagged_choice": [1, 0, 0],
})
path = write_report(folders["initial conditions"], market=market)
print(f"report: {path}")
