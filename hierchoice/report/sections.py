"""The body sections of the report, one function each, every one returning an HTML fragment.

Owns what each section shows: the convergence checks and model fit (from the diagnostics report of
:func:`hierchoice.report.status.convergence_status`), the job and data, the model, population tastes,
willingness to pay, individual tastes, the market scenario and the cautions. The numbers come from the public
functions of ``hierchoice.analysis``; sections that compute a table also add it, under its CSV file name, to the
``csv`` mapping they are given (``wtp.csv``, ``person_wtp.csv``, ``shares.csv``). Imports
:mod:`hierchoice.report.markup`, :mod:`hierchoice.report.figures` and :mod:`hierchoice.report.status` within
``hierchoice.report``; never :mod:`hierchoice.report.html`.
"""

from __future__ import annotations

import datetime as _dt
import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..analysis.tastes import taste_shrinkage
from ..analysis.wtp import coefficient_units, person_wtp, population_wtp, price_attribute, taste_units
from ..exceptions import HierchoiceError
from ..inference.results import ChoiceFit
from ..model.build import implied_priors
from .figures import (
    _caterpillar,
    _forest,
    _png,
    _png_file,
    _sensitivity_plot,
    _taste_plot,
)
from .markup import (
    _e,
    _generic_table,
    _interval,
    _kv,
    _num,
    _pct,
    _Raw,
    _records_html,
    _table,
)
from .status import _normal_verdict

__all__ = ["_cautions_section", "_convergence_section", "_fit_section", "_individual_section", "_job_section",
           "_model_section", "_priors_section", "_population_section", "_scenario_section", "_with_units", "_wtp_section"]


def _convergence_section(status: dict[str, Any], folder: Path) -> str:
    parts = []
    if not status["checks"]:
        why = f" ({status['reason']})" if status.get("reason") else ""
        parts.append(f"<p>No convergence checks are available for this fit{_e(why)}. Until they are run and pass, "
                     "treat every number in this report as provisional.</p>")
    if status["checks"]:
        rows = [[c.get("check", ""), c.get("subject", ""), c.get("shown") or _num(c.get("value")),
                 c.get("rule", c.get("threshold", "")),
                 _Raw(f"<span class='badge {_normal_verdict(c.get('verdict')).replace(' ', '')}'>"
                      f"{_e(c.get('verdict', ''))}</span>"), c.get("advice", "")]
                for c in status["checks"]]
        parts.append(f"<details><summary>All {len(rows)} checks</summary>"
                     f"{_table(['check', 'quantity', 'value', 'pass rule', 'verdict', 'advice'], rows, numeric=[2])}"
                     "</details>")
        parts.append(f"<p class='sub'>Source: {_e(status.get('source', ''))}. The checks grade R-hat, effective "
                     "sample sizes, divergences, E-BFMI and tree depth of the population parameters and the "
                     "person tastes (see docs/diagnostics.md).</p>")
    plots = status.get("plots") or {}
    shown = []
    for key, alt in (("trace", "trace plots"), ("rank", "rank plots"), ("energy", "energy plot")):
        name = plots.get(key) if isinstance(plots, dict) else None
        path = folder / str(name) if name else None
        if path is not None and path.is_file() and path.parent.resolve() == folder.resolve():
            shown.append(f"<details><summary>{_e(alt.capitalize())}</summary>{_png_file(path, alt)}</details>")
    parts += shown
    return "".join(parts)


def _fit_section(status: dict[str, Any], folder: Path) -> str | None:
    parts = []
    pred = status.get("predictive")
    if isinstance(pred, dict):
        hr = pred.get("hit_rate") if isinstance(pred.get("hit_rate"), dict) else {}
        pairs = []
        if hr:
            pairs.append(("in-sample hit rate", f"{_pct(hr.get('hit_rate'))} (chance {_pct(hr.get('chance_rate'))}, "
                                                 f"{_num(hr.get('n_tasks'))} tasks)"))
        if "calibration_error" in pred:
            pairs.append(("in-sample calibration error (not graded: see below)",
                          _num(pred.get("calibration_error"))))
        shares = pred.get("shares")
        if isinstance(shares, list) and shares:
            outside = sum(bool(r.get("outside")) for r in shares if isinstance(r, dict))
            pairs.append(("observed shares outside their predictive interval", f"{outside} of {len(shares)}"))
        if pairs:
            parts.append("<h3>Posterior-predictive checks</h3>" + _kv(pairs))
        if isinstance(shares, list) and shares:
            rows = [[r.get("statistic", ""), r.get("attribute", ""), r.get("level", ""), _pct(r.get("observed")),
                     f"{_pct(r.get('eti_low'))} – {_pct(r.get('eti_high'))}", "yes" if r.get("outside") else ""]
                    for r in shares if isinstance(r, dict)]
            parts.append(_table(["statistic", "attribute", "level", "observed share", "replicated interval",
                                 "outside"], rows, numeric=[3, 4]))
        parts.append("<p class='caption'>The in-sample hit rate uses the respondents' own estimated tastes on the "
                     "tasks they answered, so it flatters the model; a holdout check is the honest test.</p>")
    loo = status.get("loo")
    if isinstance(loo, dict):
        rows = []
        for level in ("task", "person"):
            d = loo.get(level)
            if isinstance(d, dict):
                rows.append([level, _num(d.get("elpd_loo")), _num(d.get("se")), _num(d.get("p_loo")),
                             f"{d.get('n_bad_k', '?')} of {d.get('n_data_points', '?')}"])
        if rows:
            parts.append("<h3>Leave-one-out cross-validation (PSIS-LOO)</h3>")
            parts.append(_table(["level", "elpd", "SE", "effective parameters", "Pareto k too high"], rows,
                                numeric=[1, 2, 3]))
    holdout = status.get("holdout")
    if holdout:
        parts.append("<h3>Holdout tasks</h3>" + _generic_table(holdout))
    plots = status.get("plots") or {}
    for key, alt in (("reliability", "reliability diagram"), ("ppc_shares", "posterior-predictive shares")):
        name = plots.get(key) if isinstance(plots, dict) else None
        path = folder / str(name) if name else None
        if path is not None and path.is_file() and path.parent.resolve() == folder.resolve():
            parts.append(_png_file(path, alt))
            if key == "reliability":
                parts.append("<p class='caption'>In-sample reliability: each respondent's tastes were estimated "
                             "from these very choices, so the points lie off the diagonal (observed shares more "
                             "extreme than predicted) even when the model is right. It can show gross errors "
                             "(a missing constant, a wrong sign); it cannot show calibration, and it is not graded. "
                             "The held-out calibration below (hierchoice holdout) is the test.</p>")
    parts.append(_holdout_section(folder))
    return "".join(parts) or None


def _holdout_section(folder: Path) -> str:
    """The held-out validation written by ``hierchoice holdout`` (``holdout.json``), or how to run it."""
    path = folder / "holdout.json"
    if not path.is_file():
        return ("<h3>Held-out tasks</h3><p>No holdout validation in this folder. <code>hierchoice holdout DATA "
                "--spec SPEC --out THIS_FOLDER --tasks 2</code> refits without each respondent's last tasks and "
                "scores them: the honest test of prediction and calibration.</p>")
    try:
        h = json.loads(path.read_text(encoding="utf-8"))
        rows = [[r["model"], _pct(r["hit_rate"]), _num(r["mean_lpd"]), _num(r["n_tasks"])] for r in h["table"]]
        check = h["checks"][0]
        split = h.get("split", {})
    except (OSError, ValueError, KeyError, TypeError, IndexError) as err:
        return f"<h3>Held-out tasks</h3><p>holdout.json could not be read ({_e(type(err).__name__)}).</p>"
    verdict = _normal_verdict(check.get("verdict"))
    parts = [f"<h3>Held-out tasks <span class='badge {verdict.replace(' ', '')}'>{_e(verdict)}</span></h3>",
             f"<p>Each respondent's last {_e(split.get('tasks', '?'))} task(s) ({_e(split.get('method', ''))}) "
             f"were left out, the models refitted on the other {_num(h.get('n_train_tasks'))} tasks, and the "
             f"{_num(h.get('n_test_tasks'))} held-out tasks predicted from each respondent's posterior tastes.</p>",
             _table(["model", "hit rate", "mean log predictive density per task", "tasks"], rows,
                    numeric=[1, 2, 3]),
             "<p class='caption'>mixed: this model; fixed: the same utility with everyone's tastes equal; chance: "
             "guessing among the available alternatives. Higher is better in both columns.</p>"]
    bins = [r for r in h.get("reliability", []) if isinstance(r, dict)]
    if bins:
        brows = [[f"{r['bin_lower']:.1f}–{r['bin_upper']:.1f}", _num(r["n"]), _num(r["mean_predicted"]),
                  _num(r["observed"]), f"{_num(r['band_low'])} – {_num(r['band_high'])}",
                  "yes" if r.get("outside") else ("" if r.get("graded") else "not graded")] for r in bins]
        parts.append(_table(["predicted bin", "predictions", "mean predicted", "observed share", "band",
                             "outside"], brows, numeric=[1, 2, 3, 4]))
    parts.append(f"<p class='caption'>Calibration: {_e(check.get('rule', ''))}. "
                 f"{_e(check.get('advice') or check.get('detail', ''))}</p>")
    png = folder / str(h.get("plot", ""))
    if h.get("plot") and png.is_file() and png.parent.resolve() == folder.resolve():
        parts.append(_png_file(png, "held-out reliability diagram"))
    return "".join(parts)


def _job_section(result: ChoiceFit, folder: Path) -> str:
    info, panel = result.info, result.panel
    s = panel.summary
    lo, med, hi = s.tasks_per_person
    created = str(info.get("created_at") or result.posterior.attrs.get("created_at", ""))
    try:
        stamp = _dt.datetime.fromisoformat(created)
        created = stamp.astimezone(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    except ValueError:
        pass
    job = [
        ("results folder", folder.resolve().name),
        ("fitted", created),
        ("method", f"{info.get('method', 'NUTS')} with {info.get('backend', '?')}"
                   + (" (approximate)" if info.get("approximate") else "")),
        ("chains × draws (tuning)", f"{info.get('chains', '?')} × {info.get('draws', '?')} ({info.get('tune', '?')})"),
        ("seed", info.get("seed", "")),
        ("fit time (build, compile, sample)", f"{float(info['wall_seconds']):.1f} s" if "wall_seconds" in info
         else ""),
    ]
    data = [
        ("respondents", s.persons),
        ("choice tasks", f"{s.tasks} ({lo}–{hi} per respondent, median {med:g})"),
        ("alternatives", ", ".join(s.alternatives)),
        ("model terms", ", ".join(s.attributes)),
    ]
    if s.covariates:
        data.append(("person covariates", ", ".join(s.covariates)))
    removed = "; ".join(f"{n} {r}" for r, n in s.removed.items()) or "nothing"
    filled = "; ".join(f"{n} {r}" for r, n in s.filled.items())
    data.append(("removed", removed))
    if filled:
        data.append(("filled with 0", filled))
    notes = "".join(f"<div class='note'>{_e(n)}</div>" for n in s.notes)
    return f"<h3>Job</h3>{_kv(job)}<h3>Data</h3>{_kv(data)}{notes}"


def _model_section(result: ChoiceFit) -> str:
    layout, spec = result.layout, result.spec
    rows = []
    for k, t in enumerate(layout.terms):
        if t.kind == "constant":
            what = f"constant of {t.source} (against {spec.constants.reference if spec.constants else '?'})"
        elif t.kind in ("dummy", "effects"):
            base = spec.attributes[t.source].base if t.source in spec.attributes else ""
            what = (f"{t.source} = {t.level} (0/1 against {base})" if t.kind == "dummy"
                    else f"{t.source} = {t.level} (effects coding, against the average level)")
        elif t.kind in ("lag", "lead"):
            what = f"{t.source} in the {'previous' if t.kind == 'lag' else 'next'} task"
        elif t.kind == "lagged_choice":
            what = "chose this alternative in the previous task"
        else:
            what = f"{t.name} (numeric, in the data's units)"
        if t.taste == "fixed":
            taste = "fixed: β is the same for everyone"
        elif t.taste == "normal":
            taste = "normal: β ~ N(μ, σ) across people"
        else:
            s = "−" if layout.sign(k) < 0 else ""
            taste = f"lognormal: β = {s}exp(η), η ~ N(μ, σ) across people"
        if layout.wtp_space and k != layout.price:
            taste = taste.replace("β", "w") + " (w = willingness to pay)"
        rows.append([t.name, what, taste])
    lines = [
        "U<sub>ntj</sub> = Σ<sub>k</sub> β<sub>nk</sub> x<sub>ntjk</sub> + ε<sub>ntj</sub>, "
        "&nbsp; ε i.i.d. Gumbel",
        "P(n chooses j in task t | β<sub>n</sub>) = exp(V<sub>ntj</sub>) / Σ<sub>i ∈ A<sub>nt</sub></sub> "
        "exp(V<sub>nti</sub>), &nbsp; V<sub>ntj</sub> = Σ<sub>k</sub> β<sub>nk</sub> x<sub>ntjk</sub>",
        "L<sub>n</sub> = ∫ Π<sub>t</sub> P(y<sub>nt</sub> | β) f(β | μ, σ) dβ &nbsp; (each person's tastes are "
        "shared by all of their tasks)",
    ]
    words = [
        "Each respondent n has their own tastes β<sub>n</sub>, kept for all of their choice tasks; a task's "
        "choice is a logit given those tastes (a panel mixed logit).",
    ]
    if layout.random:
        words.append("Random tastes vary across people with the population distribution f(β | μ, σ) "
                     + ("whose underlying normals are correlated (LKJ prior on the correlation matrix)."
                        if layout.correlated else "with independent tastes."))
    if layout.shifted:
        words.append("The population means shift with person covariates: μ + γ<sup>T</sup>(z<sub>n</sub> − z̄); "
                     "reported means are at the sample-average covariates.")
    if layout.wtp_space:
        price = layout.names[layout.price] if layout.price is not None else "?"
        words.append(f"The model is in willingness-to-pay space: the price coefficient is −λ<sub>n</sub> "
                     f"(λ lognormal) and every other coefficient is λ<sub>n</sub> w<sub>nk</sub>, with w the "
                     f"willingness to pay in units of {_e(price)}.")
    words.append("Priors are weakly informative on internally standardised attributes (see docs/model.md); all "
                  "numbers reported are in the data's units.")
    toml = result.spec.to_toml()
    return (f"<p>{' '.join(words)}</p>"
            + "".join(f"<div class='math'>{line}</div>" for line in lines)
            + _table(["term", "what it is", "taste across people"], rows)
            + f"<details><summary>The spec as fitted (TOML)</summary><pre>{_e(toml)}</pre></details>")


def _priors_section(result: ChoiceFit, status: dict[str, Any]) -> str:
    """The priors in the data's units, and how much each population parameter moves when the prior is scaled."""
    priors = implied_priors(result.layout, result.spec.model.prior_scale)
    prob = priors.attrs["prob"]
    rows = [[r.attribute, r.parameter, r.what, r.distribution, f"{_num(r.eti_low)} – {_num(r.eti_high)}"]
            for r in priors.itertuples()]
    parts = [f"<p>The population priors, mapped to the data's units (each taste's unit is that of its attribute; "
             f"model.prior_scale = {_num(result.spec.model.prior_scale)}). The interval holds {prob:.0%} of the "
             "prior's mass: values far outside it are possible only if the data insist (see docs/model.md).</p>",
             _table(["term", "parameter", "what", "prior (data's units)", f"{prob:.0%} prior interval"], rows,
                    numeric=[4])]
    sens = status.get("sensitivity")
    if not isinstance(sens, dict) or not isinstance(sens.get("table"), list):
        parts.append("<p>No prior-sensitivity check is in diagnostics.json for this fit (run "
                     "<code>hierchoice check</code>).</p>")
        return "".join(parts)
    t = sens.get("threshold", 0.05)
    rows = [[r.get("parameter", ""), _num(r.get("prior")), _num(r.get("likelihood")), r.get("diagnosis") or "—"]
            for r in sens["table"] if isinstance(r, dict)]
    parts.append("<h3>Prior sensitivity (power-scaling)</h3>"
                 f"<p>How far each population parameter's posterior moves when the prior (or the likelihood) is "
                 "raised to a power near 1, estimated by importance weighting without refitting (Kallioinen, "
                 "Paananen, Bürkner &amp; Vehtari 2024, <i>Statistics and Computing</i> 34:57). A prior "
                 f"sensitivity of {_num(t)} or more means the prior moves a reported number: "
                 "<b>prior-dominated</b> when the data move it less than that, <b>prior-data conflict</b> when "
                 "they move it too. Either way, widen the prior (model.prior_scale) or collect more persons "
                 "before reading the number as the data's.</p>")
    parts.append(_table(["parameter", "prior sensitivity", "likelihood sensitivity", "diagnosis"], rows,
                        numeric=[1, 2]))
    flagged = [c for c in sens.get("checks", []) if isinstance(c, dict) and c.get("verdict") != "pass"]
    if flagged:
        parts.append("<ul>" + "".join(f"<li><b>{_e(c.get('subject', ''))}</b>: {_e(c.get('advice', ''))}</li>"
                                      for c in flagged) + "</ul>")
    return "".join(parts)


#: The unit of the population-tastes rows that are not in a term's units.
_FIXED_UNITS = {"share_positive": "share of people", "correlation": "correlation of the underlying normals (no unit)"}


def _with_units(result: ChoiceFit, table: pd.DataFrame) -> pd.DataFrame:
    """A tastes table with a ``unit`` column after ``attribute`` (or ``scale``): the unit of each row.

    ``population_tastes`` rows: ``population_mean`` / ``population_sd`` and covariate effects are on the scale of the
    population's normal distribution (a lognormal term's log), the rest in the term's units (in WTP space: money
    per unit for every term but price, utility per unit for price). ``person_tastes`` rows: each person's utility
    coefficient, in either space.
    """
    out = table.copy()
    if "quantity" not in out:
        units = coefficient_units(result)
        out.insert(list(out.columns).index("attribute") + 1, "unit", [units[a] for a in out["attribute"]])
        return out
    value, latent = taste_units(result), taste_units(result, latent=True)

    def unit(quantity: str, attribute: str, other: str) -> str:
        if quantity in _FIXED_UNITS:
            return _FIXED_UNITS[quantity]
        if quantity == "covariate_effect":
            return f"{latent[attribute]}, per unit of {other}"
        return latent[attribute] if quantity.startswith("population_") else value[attribute]

    others = out["other"] if "other" in out else [""] * len(out)
    at = list(out.columns).index("scale" if "scale" in out else "attribute") + 1
    rows = zip(out["quantity"], out["attribute"], others)
    out.insert(at, "unit", [unit(str(q), str(a), str(o)) for q, a, o in rows])
    return out


def _population_section(result: ChoiceFit, table: pd.DataFrame, persons: pd.DataFrame | None, prob: float) -> str:
    layout = result.layout
    if "unit" not in table:
        table = _with_units(result, table)
    get = {(q, a): r for q, a, r in zip(table["quantity"], table["attribute"], table.to_dict("records"))}
    rows = []
    for k, name in enumerate(layout.names):
        taste = layout.terms[k].taste + (f" ({'negative' if layout.sign(k) < 0 else 'positive'})"
                                         if layout.is_lognormal(k) else "")
        mean = get.get(("mean_across_people", name))
        median = get.get(("median_across_people", name))
        sd = get.get(("sd_across_people", name))
        p10, p90 = get.get(("p10_across_people", name)), get.get(("p90_across_people", name))
        share = get.get(("share_positive", name))
        unit = (mean or median or {}).get("unit", "")
        spread = f"{_num(p10['median'])} to {_num(p90['median'])}" if p10 and p90 else "everyone the same"
        rows.append([name, taste, unit, _interval(mean) if mean else "", _interval(median) if median else "–",
                     _interval(sd) if sd else "0", spread, _interval(share, _pct) if share else ""])
    pct = f"{100 * prob:g} %"
    head = ["term", "taste", "unit", "mean across people", "median across people", "SD across people",
            "10 % – 90 % of people", "share with a positive value"]
    space = (" In this willingness-to-pay-space model every term but the price describes the willingness to pay "
             "(money per unit), the price its utility coefficient (utility per unit of price): the unit column "
             "says which." if layout.wtp_space else "")
    body = [
        f"<p>For each term, the distribution of the coefficient (in WTP space: of the willingness to pay) across "
        f"people implied by the posterior, in the unit of its row. Cells show the posterior median and, in "
        f"brackets, the {pct} highest-density interval. The 10 %–90 % column is the posterior median of those "
        f"quantiles: the spread of tastes between people, not uncertainty. Utility is on the logit scale.{space}</p>",
        _table(head, rows),
    ]
    if layout.shifted:
        body.append("<div class='note'>With covariates, these describe a person with the sample-average "
                    "covariates.</div>")
    corr = table[table["quantity"] == "correlation"]
    if len(corr):
        body.append("<h3>Correlations between random tastes</h3>")
        body.append(_table(["term", "with", f"correlation of the underlying normals, no unit [{pct} HDI]"],
                           [[r["attribute"], r["other"], _interval(r)] for r in corr.to_dict("records")]))
    cov = table[table["quantity"] == "covariate_effect"]
    if len(cov):
        body.append("<h3>Covariate effects on the population means</h3>")
        body.append(_table(["term", "covariate", "unit", f"shift [{pct} HDI]"],
                           [[r["attribute"], r["other"], r["unit"], _interval(r)] for r in cov.to_dict("records")]))
    plot = _taste_plot(result, persons, taste_units(result))
    if plot:
        body.append("<h3>Tastes across people</h3>" + plot)
        body.append("<p class='caption'>Blue: the population distribution of each random taste (median curve and 90 % "
                    "band over the posterior). Orange: the respondents' own posterior means, which sit closer to the "
                    "centre than the population distribution because each respondent made only a few choices "
                    "(shrinkage; see Individual tastes).</p>")
    body.append("<p class='sub'>Full table with both interval kinds (HDI and equal-tailed): "
                "population_tastes.csv.</p>")
    return "".join(body)


def _wtp_section(result: ChoiceFit, prob: float, csv: dict[str, pd.DataFrame]) -> str:
    try:
        price = price_attribute(result)
    except HierchoiceError:
        return ("<p>No price attribute is named in the spec, so willingness to pay is not computed. Set "
                "<code>price = \"&lt;attribute&gt;\"</code> in the spec's [model] table.</p>")
    pop = population_wtp(result, prob=prob)
    csv["wtp.csv"] = pop
    parts = [_records_html(pop.attrs["warnings"])]
    space = ("read directly from the willingness-to-pay-space model" if result.layout.wtp_space else
             f"computed draw by draw as −β<sub>k</sub> / β<sub>{_e(price)}</sub>, for new people drawn from the "
             "population distribution")
    parts.append(f"<p>Willingness to pay in units of <strong>{_e(price)}</strong>, {space}. A positive value is "
                 "what a person would pay for one more unit (or for the level instead of the base); a negative "
                 "value is what they would need to be compensated with, e.g. for a longer journey.</p>")
    get = {(q, a): r for q, a, r in zip(pop["quantity"], pop["attribute"], pop.to_dict("records"))}
    names = list(dict.fromkeys(pop["attribute"]))
    rows = []
    for a in names:
        med, mean = get.get(("median_across_people", a)), get.get(("mean_across_people", a))
        p10, p90 = get.get(("p10_across_people", a)), get.get(("p90_across_people", a))
        share = get.get(("share_positive", a))
        unit = med["unit"] if med else ""
        rows.append([a, unit, _interval(med) if med else "",
                     _interval(mean) if mean else "not reported (no finite mean)",
                     f"{_num(p10['median'])} to {_num(p90['median'])}" if p10 and p90 else "",
                     _interval(share, _pct) if share else ""])
    pct = f"{100 * prob:g} %"
    parts.append(_table(["term", "unit", f"median across people [{pct} HDI]", "mean across people",
                         "10 % – 90 % of people", "share willing to pay (> 0)"], rows))
    if names:
        meds = [get[("median_across_people", a)] for a in names]
        spread = None
        if all(("p10_across_people", a) in get for a in names):
            spread = (np.array([get[("p10_across_people", a)]["median"] for a in names]),
                      np.array([get[("p90_across_people", a)]["median"] for a in names]))
        fig = _forest(names, np.array([m["median"] for m in meds]), np.array([m["hdi_low"] for m in meds]),
                      np.array([m["hdi_high"] for m in meds]), xlabel=f"willingness to pay ({price})",
                      spread=spread, spread_label="10 %–90 % of people",
                      interval_label=f"median across people, {pct} HDI")
        parts.append(_png(fig, "Willingness to pay by term"))
        parts.append("<p class='caption'>Dot and dark line: the median WTP across people with its credible interval. "
                     "Light bar: the range from the 10th to the 90th percentile of people. Terms have different "
                     "units (per minute, per level, ...); compare each against zero rather than against each "
                     "other.</p>")
    if result.has_person_draws:
        person = person_wtp(result, prob=prob)
        csv["person_wtp.csv"] = person
        parts.append(_records_html(person.attrs["warnings"]))
        parts.append("<p class='sub'>Each respondent's WTP (median and intervals): person_wtp.csv.</p>")
    return "".join(parts)


def _individual_section(result: ChoiceFit, persons: pd.DataFrame | None, prob: float) -> str:
    if persons is None:
        return ("<p>This fit kept no person draws (sampling.store_person_draws = false): individual tastes are not "
                "available. Refit with store_person_draws = true to see them.</p>")
    parts = [f"<p>Each respondent's own tastes, as posterior means and {100 * prob:g} % intervals, are in "
             "<strong>person_tastes.csv</strong> (one row per respondent and term, utility coefficients with their "
             "unit" + ("; the willingness to pay of each respondent is in person_wtp.csv" if result.layout.wtp_space
                       else "") + "). They combine the respondent's "
             "choices with the population distribution: with few choices per person, an estimate is pulled "
             "towards the population mean (shrinkage), so individual numbers are uncertain and should be read with "
             "their intervals.</p>"]
    shrink = taste_shrinkage(result)
    if len(shrink):
        latent = taste_units(result, latent=True)
        rows = [[r["attribute"], latent[r["attribute"]], _num(r["population_sd"]), _num(r["sd_of_person_means"]),
                 _num(r["spread_ratio"]), _num(r["person_sd"]), _pct(max(0.0, r["information"]))]
                for r in shrink.to_dict("records")]
        parts.append(_table(["term", "unit (SDs)", "population SD", "SD of respondents' means", "ratio",
                             "typical person posterior SD", "share of spread explained by own choices"], rows,
                            numeric=[2, 3, 4, 5, 6]))
        parts.append("<p class='caption'>A ratio near 1 (and a share near 100 %) means respondents' own choices pin "
                     "down their tastes; near 0, individual estimates mostly repeat the population mean and should "
                     "not be used to tell people apart.</p>")
    plot = _caterpillar(result, persons, coefficient_units(result))
    if plot:
        parts.append(plot)
        parts.append(f"<p class='caption'>Each respondent's posterior mean and {100 * prob:g} % equal-tailed "
                     "interval of their utility coefficient (the unit is on each panel's axis), sorted.</p>")
    return "".join(parts)


def _scenario_section(result: ChoiceFit, market: Any, prob: float, csv: dict[str, pd.DataFrame]) -> str:
    from ..analysis.shares import (
        PERSONS,
        elasticities,
        predict_shares,
        read_market,
        sensitivity,
    )

    frame = read_market(market)
    tables = {}
    for persons in PERSONS:
        if persons == "panel" and not result.has_person_draws:
            continue
        tables[persons] = predict_shares(result, frame, persons=persons, prob=prob)
    main = tables["population"]
    csv["shares.csv"] = pd.concat([t.assign(persons=p) for p, t in tables.items()], ignore_index=True)
    pct = f"{100 * prob:g} %"
    shown = frame.astype(object).map(lambda v: "" if pd.isna(v) else _num(v) if isinstance(v, (int, float))
                                     and not isinstance(v, bool) else v)
    parts = ["<h3>The market</h3>", _table(list(shown.columns), shown.values.tolist()),
             _records_html(main.attrs["warnings"])]
    head = ["alternative", f"share: new people from the population [{pct} HDI]"]
    if "panel" in tables:
        head.append(f"share: the survey's respondents [{pct} HDI]")
    rows = []
    for i, r in enumerate(main.to_dict("records")):
        row = [r["alternative"], _interval(r, _pct)]
        if "panel" in tables:
            row.append(_interval(tables["panel"].iloc[i], _pct))
        rows.append(row)
    parts += ["<h3>Predicted shares</h3>", _table(head, rows)]
    parts.append("<p><strong>New people from the population</strong>: for each posterior draw, new people are drawn "
                 "from the estimated population distribution of tastes and their logit probabilities averaged; this "
                 "is the prediction for the population the sample represents. <strong>The survey's "
                 "respondents</strong>: the same average over the respondents' own posterior tastes; it predicts "
                 "what these particular people would choose.</p>")
    fig = _forest(list(main["alternative"]), main["median"].to_numpy(), main["hdi_low"].to_numpy(),
                  main["hdi_high"].to_numpy(), xlabel="predicted share (new people from the population)",
                  as_percent=True)
    parts.append(_png(fig, "Predicted shares"))
    parts.append(f"<p class='caption'>Posterior median share and {pct} HDI of each alternative.</p>")
    try:
        price = price_attribute(result)
    except HierchoiceError:
        price = None
    if price is not None:
        try:
            el = elasticities(result, frame, attribute=price, prob=prob)
        except HierchoiceError as err:
            parts.append(f"<p class='sub'>Elasticities not computed: {_e(err)}</p>")
        else:
            rows = [[r["changed"], r["share_of"], r["kind"], _interval(r)] for r in el.to_dict("records")]
            parts += [f"<h3>Elasticities with respect to {_e(price)}</h3>",
                      _table([f"{price} of", "share of", "kind", f"elasticity, % per % [{pct} HDI]"], rows),
                      f"<p class='caption'>The % change in the share of an alternative for a 1 % rise in the "
                      f"{_e(price)} of one alternative (own: its own share; cross: the others').</p>"]
            first = str(el["changed"].iloc[0])
            curve = sensitivity(result, frame, alternative=first, attribute=price, prob=prob)
            parts.append(_sensitivity_plot(curve, price, first))
    return "".join(parts)


_CAUTIONS = [
    "Check convergence before reading any result: a failed or missing convergence verdict makes every number in "
    "this report provisional.",
    "This is a stated-preference model: it describes the choices people made in a survey. Predicted shares are "
    "not a forecast guarantee; real markets add awareness, availability, habits and competitors that the survey "
    "did not show.",
    "Every interval is conditional on the model: the taste distributions, the attributes included and the logit "
    "form are assumptions. Intervals say nothing about error in those assumptions.",
    "Predictions for attribute values outside the ranges of the design are extrapolation; the report flags them, "
    "but even inside the ranges, combinations never shown to respondents are less certain.",
    "Willingness to pay is a ratio of two coefficients. Where the price coefficient can be zero (a normal price "
    "taste, or a fixed one whose posterior reaches zero) WTP has no mean: means are withheld and only medians and "
    "quantiles are reported. With a lognormal price the mean exists and is reported, but a wide price distribution "
    "puts it far from the median.",
]


def _cautions_section(result: Any = None) -> str:
    """The usual cautions; an approximate fit's caution comes first."""
    from ..inference.results import APPROXIMATE_CAUTION

    items = ([APPROXIMATE_CAUTION] if getattr(result, "approximate", False) else []) + list(_CAUTIONS)
    return "<ul>" + "".join(f"<li>{_e(c)}</li>" for c in items) + "</ul>"
