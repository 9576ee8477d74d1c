"""The stakeholder report: one self-contained HTML file and CSV tables beside it.

:func:`write_report` reads a results folder (or takes a fit and a folder to write into) and writes, into that
folder,

``report.html``
    One file that opens offline in any browser: plots are embedded PNG images
    (base64), styles are inline, and there are no scripts, web fonts or links
    to other sites. Its sections, in order: the **convergence verdict** (from
    :mod:`hierchoice.diagnostics.checks`; a failed or missing verdict is shown first and
    marks every later section *provisional*), the job and the data, the model
    in words and formulas, population tastes, willingness to pay, individual
    tastes, model fit (posterior-predictive checks, LOO, holdout), the market
    scenario (when one is given), and the cautions that go with any
    stated-preference result.
``population_tastes.csv``, ``person_tastes.csv``, ``wtp.csv``, ``person_wtp.csv``, ``shares.csv``
    The tables behind the report (see :mod:`hierchoice.analysis.tastes`,
    :mod:`hierchoice.analysis.wtp` and :mod:`hierchoice.analysis.shares`); person tables need person
    draws, WTP tables a price attribute, ``shares.csv`` a market. The taste and WTP tables carry a ``unit``
    column: the unit of each row (utility per unit of a term, price per unit of a term, share of people, ...),
    so that a willingness-to-pay-space fit, whose price row is a utility coefficient and whose other rows are
    money, never shows two units under one header.

Every piece of user text (attribute, alternative and person names, the spec,
messages) is HTML-escaped. The report is a thin layer: every number in it comes
from the public functions of the modules above. ``docs/reporting.md`` explains
how to read it.

This module owns the page: its styles, the verdict banner, the frame of each section, and :func:`write_report`,
which loads the fit once and hands it to :func:`hierchoice.report.status.convergence_status` and to every
section (:mod:`hierchoice.report.sections`), then writes the CSV tables and the page. The top of
``hierchoice.report``: may import its other modules and every stage below the report, never the CLI.
"""

from __future__ import annotations

import datetime as _dt
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import pandas as pd

from .._args import NOT_GIVEN, aliased
from .._io import atomic_write_text, make_folder, write_with
from ..analysis.shares import Market
from ..analysis.tastes import DEFAULT_PROB, check_prob, person_tastes, population_tastes
from ..exceptions import ArchiveError
from ..inference.results import ChoiceFit, FitLike, as_fit
from .markup import _e, _num
from .sections import (
    _cautions_section,
    _convergence_section,
    _fit_section,
    _individual_section,
    _job_section,
    _model_section,
    _population_section,
    _priors_section,
    _scenario_section,
    _with_units,
    _wtp_section,
)
from .status import _normal_verdict, convergence_status

__all__ = ["REPORT_FILE", "write_report"]

REPORT_FILE = "report.html"

_VERDICT_TEXT = {
    "pass": ("Converged", "Every convergence check passed. The results below can be read, within the cautions at "
             "the end."),
    "warn": ("Converged with warnings", "No convergence check failed, but some gave warnings (listed here). Read "
             "the advice before relying on the affected quantities."),
    "fail": ("NOT converged", "At least one convergence check failed. Every result below is provisional and may be "
             "wrong: follow the advice, refit, and check again before using any number from this report."),
    "not checked": ("not checked", "No convergence verdict is available for this fit, so every result below is "
                    "provisional. Run the convergence checks (hierchoice check on the results folder), then make the "
                    "report again."),
}

_CSS = """
:root { --ink:#1d2630; --muted:#5b6875; --line:#d7dde3; --paper:#ffffff; --band:#f3f5f7; --accent:#23577a;
        --pass:#1f6f43; --pass-bg:#e6f3eb; --warn:#8a5a00; --warn-bg:#fff4dc; --fail:#a3161a; --fail-bg:#fde7e7; }
* { box-sizing: border-box; }
body { margin:0; background:var(--band); color:var(--ink);
       font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }
main { max-width: 1080px; margin: 0 auto; padding: 24px 28px 64px; background: var(--paper); }
h1 { font-size: 1.6em; margin: 0.2em 0 0.1em; }
h2 { font-size: 1.25em; margin: 2.2em 0 0.6em; padding-bottom: 0.25em; border-bottom: 2px solid var(--line); }
h3 { font-size: 1.05em; margin: 1.6em 0 0.4em; }
p, li { max-width: 78ch; }
.sub { color: var(--muted); margin: 0 0 1em; }
.verdict { border-radius: 6px; padding: 14px 18px; margin: 18px 0 8px; border-left: 8px solid; }
.verdict .head { font-size: 1.35em; font-weight: 700; margin: 0 0 4px; }
.verdict.pass { background: var(--pass-bg); border-color: var(--pass); }
.verdict.warn { background: var(--warn-bg); border-color: var(--warn); }
.verdict.fail, .verdict.notchecked { background: var(--fail-bg); border-color: var(--fail); }
.verdict.fail .head, .verdict.notchecked .head { color: var(--fail); }
.verdict ul { margin: 6px 0 0; padding-left: 20px; }
.badge { display: inline-block; font-size: 0.72em; font-weight: 700; letter-spacing: 0.04em; padding: 2px 8px;
         border-radius: 10px; vertical-align: middle; margin-left: 8px; text-transform: uppercase; }
.badge.provisional { background: var(--fail-bg); color: var(--fail); border: 1px solid var(--fail); }
.badge.pass { background: var(--pass-bg); color: var(--pass); }
.badge.warn { background: var(--warn-bg); color: var(--warn); }
.badge.fail { background: var(--fail-bg); color: var(--fail); }
.note { background: var(--band); border-left: 4px solid var(--accent); padding: 8px 12px; margin: 10px 0; }
.caution { background: var(--warn-bg); border-left: 4px solid var(--warn); padding: 8px 12px; margin: 10px 0; }
table { border-collapse: collapse; margin: 8px 0 14px; font-size: 0.9em; }
th, td { padding: 4px 10px; border-bottom: 1px solid var(--line); text-align: left; vertical-align: top; }
th { background: var(--band); font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.kv th { width: 15em; background: none; font-weight: 600; }
.wide { overflow-x: auto; }
img { max-width: 100%; height: auto; display: block; margin: 8px 0 4px; }
img.diag { max-width: 680px; }
.caption { color: var(--muted); font-size: 0.88em; margin: 0 0 14px; }
.math { font-family: "Cambria Math", "STIX Two Math", "Latin Modern Math", Georgia, serif; font-size: 1.05em;
        background: var(--band); padding: 8px 14px; margin: 8px 0; border-radius: 4px; }
pre { background: var(--band); padding: 10px 14px; overflow-x: auto; font-size: 0.85em; }
nav ol { columns: 2; max-width: 640px; }
details > summary { cursor: pointer; color: var(--accent); margin: 6px 0; }
footer { margin-top: 40px; color: var(--muted); font-size: 0.85em; }
"""


def _section(anchor: str, title: str, body: str, provisional: bool) -> str:
    badge = "<span class='badge provisional'>provisional</span>" if provisional else ""
    return f"<section id='{anchor}'><h2>{_e(title)}{badge}</h2>{body}</section>"


def _verdict_block(status: dict[str, Any]) -> str:
    verdict = status["verdict"]
    head, text = _VERDICT_TEXT[verdict]
    cls = verdict.replace(" ", "")
    items = []
    ranked = sorted(status["checks"], key=lambda c: _normal_verdict(c.get("verdict")) != "fail")
    for c in ranked:
        v = _normal_verdict(c.get("verdict"))
        if v in ("fail", "warn"):
            subject = f" {c.get('subject')}" if c.get("subject") else ""
            advice = f" — {c.get('advice')}" if c.get("advice") else ""
            items.append(f"<li><span class='badge {v}'>{_e(v)}</span> <strong>{_e(c.get('check'))}{_e(subject)}"
                         f"</strong> = {_e(c.get('shown') or _num(c.get('value')))} "
                         f"(rule: {_e(c.get('rule', c.get('threshold')))})"
                         f"{_e(advice)}</li>")
    reason = f"<p><strong>Why:</strong> {_e(status['reason'])}</p>" if verdict == "not checked" and status.get(
        "reason") else ""
    listing = f"<ul>{''.join(items)}</ul>" if items else ""
    return (f"<div class='verdict {cls}' role='status'><div class='head'>Convergence: {_e(head)}</div>"
            f"<div>{_e(text)}</div>{reason}{listing}</div>")


# --------------------------------------------------------------------------- the report


def write_report(source: FitLike, *, out: str | Path | None = None, market: Market | None = None,
                 hdi_prob: float = DEFAULT_PROB, title: str | None = None, prob: Any = NOT_GIVEN) -> Path:
    """Write ``report.html`` and its CSV tables into a results folder.

    Parameters
    ----------
    source : path or ChoiceFit
        A results folder written by :func:`hierchoice.save_fit` (the report goes into it), or a fit in memory
        (the report goes into ``out``).
    out : path, optional
        With a fit: the folder to write the report, its tables and the diagnostics into (made if it does not
        exist; a folder hierchoice wrote, such as the fit's results folder, may be reused). With a results
        folder: leave it unset.
    market : DataFrame, dict, list of rows or path, optional
        A market scenario (see :mod:`hierchoice.analysis.shares`) whose predicted shares,
        elasticities and price sensitivity the report shows; ``shares.csv`` is
        written with it.
    hdi_prob : float, default 0.9
        Probability mass of the credible intervals (HDI and equal-tailed); ``prob`` is its older name.
    title : str, optional
        What the results are of (the page title reads "Choice model results: TITLE"). Default: the results
        folder's name, or its parent's when the folder has a generic name such as ``results``.

    Returns
    -------
    Path
        The path of ``report.html``.

    Notes
    -----
    The convergence verdict comes from :func:`convergence_status`: a
    ``diagnostics.json`` of this fit, or else :func:`hierchoice.diagnostics.folder.check_folder`
    (which writes it). If neither is possible the report says so at the top and
    marks every section provisional; it is written all the same.
    """
    prob = check_prob(aliased("hdi_prob", hdi_prob, "prob", prob, DEFAULT_PROB))
    if isinstance(source, ChoiceFit):
        if out is None:
            raise ArchiveError("write_report(fit) needs out=, the folder to write report.html, its tables and the "
                               "diagnostics into (or pass the fit's results folder instead of the fit).")
        result, folder = source, make_folder(out, "results")
    else:
        result = as_fit(source, "write_report")
        folder = Path(source)
        if out is not None and Path(out).resolve() != folder.resolve():
            raise ArchiveError(f"The report of the results folder {str(folder)!r} is written into that folder; "
                               "leave out= unset, or pass hierchoice.load_fit(folder) with out= to write it "
                               "elsewhere.")
    status = convergence_status(folder, result)
    provisional = status["verdict"] in ("fail", "not checked")
    csv: dict[str, pd.DataFrame] = {}

    pop = _with_units(result, population_tastes(result, hdi_prob=prob))
    csv["population_tastes.csv"] = pop
    persons = _with_units(result, person_tastes(result, hdi_prob=prob)) if result.has_person_draws else None
    if persons is not None:
        csv["person_tastes.csv"] = persons
    sections: list[tuple[str, str, str, bool]] = [
        ("convergence", "Convergence", _convergence_section(status, folder), False),
        ("job", "Job and data", _job_section(result, folder), False),
        ("model", "The model", _model_section(result), False),
        ("priors", "Priors and prior sensitivity", _priors_section(result, status), False),
        ("tastes", "Population tastes", _population_section(result, pop, persons, prob), provisional),
        ("wtp", "Willingness to pay", _wtp_section(result, prob, csv), provisional),
        ("individual", "Individual tastes", _individual_section(result, persons, prob), provisional),
    ]
    fit_body = _fit_section(status, folder)
    sections.append(("fit", "Model fit", fit_body or "<p>No posterior-predictive, LOO or holdout results are in "
                     "diagnostics.json for this fit (run <code>hierchoice check</code>).</p>", provisional))
    if market is not None:
        sections.append(("scenario", "Market scenario", _scenario_section(result, market, prob, csv), provisional))
    else:
        sections.append(("scenario", "Market scenario", "<p>No market was given. To see predicted shares, make a "
                         "market table (one row per alternative, the data's attribute columns) and run "
                         "<code>hierchoice report DIR --market market.csv</code>; see docs/reporting.md.</p>", False))
    sections.append(("cautions", "Cautions", _cautions_section(result), False))
    for name, table in csv.items():
        write_with(folder / name, lambda tmp, t=table: t.to_csv(tmp, index=False, encoding="utf-8"))
    sections.append(("files", "Files", _files_list(folder, [REPORT_FILE, *csv]), False))
    page = _page(result, folder, status, sections, title or _default_title(folder))
    return atomic_write_text(folder / REPORT_FILE, page)


#: What each file of a results folder holds (the Files section lists every file the folder has).
_FILE_NOTES = {
    "posterior.nc": "the posterior draws, data and fit settings (NetCDF; hierchoice.load_fit reopens it)",
    "spec.toml": "the spec as fitted",
    "fit.log": "the fit's settings and timing",
    "diagnostics.json": "every convergence and predictive check (hierchoice check)",
    REPORT_FILE: "this report",
    "population_tastes.csv": "population tastes: every quantity with HDI and equal-tailed intervals",
    "person_tastes.csv": "each respondent's tastes", "wtp.csv": "willingness to pay across people",
    "person_wtp.csv": "each respondent's willingness to pay", "shares.csv": "the market scenario's shares",
    "holdout.json": "held-out validation (hierchoice holdout)", "holdout_tasks.csv": "each held-out task's score",
}
_GENERIC_NAMES = {"results", "result", "out", "output", "outputs", "fit", "fits"}


def _default_title(folder: Path) -> str:
    """The results folder's name, or its parent's when the folder has a generic name ("results")."""
    here = folder.resolve()
    if here.name.lower() in _GENERIC_NAMES and here.parent.name:
        return here.parent.name
    return here.name


def _files_list(folder: Path, writing: Sequence[str]) -> str:
    """Every file the folder holds (and those being written with this report), with what each one is."""
    names = sorted({p.name for p in folder.iterdir() if p.is_file() and not p.name.startswith(".")}
                   | set(writing))
    items = "".join(f"<li><code>{_e(n)}</code>" + (f" — {_e(_FILE_NOTES[n])}" if n in _FILE_NOTES else
                    " — diagnostic plot" if n.endswith(".png") else "") + "</li>" for n in names)
    return f"<p>The results folder holds {len(names)} files:</p><ul>{items}</ul>"


def _page(result: ChoiceFit, folder: Path, status: dict[str, Any],
          sections: Sequence[tuple[str, str, str, bool]], name: str) -> str:
    from .._version import __version__

    title = f"Choice model results: {name}"
    now = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    s = result.panel.summary
    toc = "".join(f"<li><a href='#{a}'>{_e(t)}</a></li>" for a, t, _b, _p in sections)
    body = "".join(_section(a, t, b, p) for a, t, b, p in sections)
    return (
        "<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
        "<meta name='viewport' content='width=device-width, initial-scale=1'>"
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body><main>"
        f"<h1>{_e(title)}</h1>"
        f"<p class='sub'>{_e(s.persons)} respondents, {_e(s.tasks)} choice tasks, alternatives "
        f"{_e(', '.join(s.alternatives))}. Report made {_e(now)} by hierchoice {_e(__version__)}.</p>"
        f"{_verdict_block(status)}<nav><ol>{toc}</ol></nav>{body}"
        "<footer>Made by hierchoice. Intervals are Bayesian credible intervals conditional on the model.</footer>"
        "</main></body></html>\n"
    )
