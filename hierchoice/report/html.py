"""The stakeholder report: one self-contained HTML file and CSV tables beside it.

:func:`write_report` reads a results folder and writes, into the same folder,

``report.html``
    One file that opens offline in any browser: plots are embedded PNG images
    (base64), styles are inline, and there are no scripts, web fonts or links
    to other sites. Its sections, in order: the **convergence verdict** (from
    :mod:`hierchoice.checks`; a failed or missing verdict is shown first and
    marks every later section *provisional*), the job and the data, the model
    in words and formulas, population tastes, willingness to pay, individual
    tastes, model fit (posterior-predictive checks, LOO, holdout), the market
    scenario (when one is given), and the cautions that go with any
    stated-preference result.
``population_tastes.csv``, ``person_tastes.csv``, ``wtp.csv``, ``person_wtp.csv``, ``shares.csv``
    The tables behind the report (see :mod:`hierchoice.tastes`,
    :mod:`hierchoice.wtp` and :mod:`hierchoice.shares`); person tables need person
    draws, WTP tables a price attribute, ``shares.csv`` a market.

Every piece of user text (attribute, alternative and person names, the spec,
messages) is HTML-escaped. The report is a thin layer: every number in it comes
from the public functions of the modules above. ``docs/reporting.md`` explains
how to read it.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import json
import logging
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .._io import atomic_write_text, write_with
from ..analysis.tastes import (
    DEFAULT_PROB,
    WarningRecord,
    check_prob,
    person_tastes,
    population_tastes,
    taste_shrinkage,
)
from ..exceptions import HierchoiceError
from ..inference.results import ChoiceFit

__all__ = ["REPORT_FILE", "convergence_status", "write_report"]

log = logging.getLogger("hierchoice")

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


# --------------------------------------------------------------------------- small HTML helpers


class _Raw(str):
    """Trusted HTML made by this module (never user text)."""


def _e(value: Any) -> str:
    """HTML-escape any value (user text included)."""
    if isinstance(value, _Raw):
        return str(value)
    return html.escape(str(value), quote=True)


def _num(value: Any) -> str:
    """A number with about three significant digits; an en dash when missing."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    if not np.isfinite(v):
        return "–"
    a = abs(v)
    if a == 0:
        return "0"
    if a >= 1e5 or a < 1e-4:
        return f"{v:.2e}"
    return f"{v:,.0f}" if a >= 1000 else f"{v:.3g}"


def _pct(value: Any) -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    return "–" if not np.isfinite(v) else f"{100 * v:.1f} %"


def _interval(row: Any, fmt: Any = _num) -> _Raw:
    """``median [hdi_low, hdi_high]`` of a summary row."""
    return _Raw(f"{_e(fmt(row['median']))} <span class='sub'>[{_e(fmt(row['hdi_low']))}, "
                f"{_e(fmt(row['hdi_high']))}]</span>")


def _table(columns: Sequence[str], rows: Sequence[Sequence[Any]], *, numeric: Sequence[int] = ()) -> str:
    head = "".join(f"<th>{_e(c)}</th>" for c in columns)
    body = []
    for row in rows:
        cells = "".join(f"<td class='num'>{_e(v)}</td>" if i in numeric else f"<td>{_e(v)}</td>"
                        for i, v in enumerate(row))
        body.append(f"<tr>{cells}</tr>")
    return f"<div class='wide'><table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table></div>"


def _kv(pairs: Sequence[tuple[str, Any]]) -> str:
    rows = "".join(f"<tr><th>{_e(k)}</th><td>{_e(v)}</td></tr>" for k, v in pairs)
    return f"<table class='kv'><tbody>{rows}</tbody></table>"


def _records_html(records: Sequence[WarningRecord]) -> str:
    return "".join(f"<div class='caution'><strong>{_e(r.kind.replace('_', ' '))}:</strong> {_e(r.message)}</div>"
                   for r in records)


def _mpl_text(text: Any) -> str:
    """Text for matplotlib: escape ``$`` so that user names are never read as mathtext."""
    return str(text).replace("\\", "\\\\").replace("$", r"\$")


def _figure(width: float, height: float) -> Any:
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), dpi=100, layout="constrained")


def _png(fig: Any, alt: str) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    return f"<img alt='{_e(alt)}' src='data:image/png;base64,{data}'>"


def _png_file(path: Path, alt: str) -> str:
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f"<img class='diag' alt='{_e(alt)}' src='data:image/png;base64,{data}'>"


# --------------------------------------------------------------------------- convergence


def _normal_verdict(value: Any) -> str:
    text = str(value).strip().lower()
    if text in ("pass", "ok", "passed", "good"):
        return "pass"
    if text in ("warn", "warning", "warnings", "caution"):
        return "warn"
    if text in ("fail", "failed", "bad", "error"):
        return "fail"
    return "not checked"


def _same_fit(report: dict[str, Any], result: ChoiceFit) -> bool:
    """Whether a stored diagnostics report belongs to this fit (not a stale one)."""
    stored = report.get("fit")
    if not isinstance(stored, dict):
        return True
    keys = ("wall_seconds", "seed", "draws", "chains", "backend")
    return all(str(stored.get(k)) == str(result.info.get(k)) for k in keys if k in result.info)


def convergence_status(folder: str | Path, result: ChoiceFit | None = None) -> dict[str, Any]:
    """The convergence verdict of a results folder, or why there is none.

    Reads ``diagnostics.json`` when it belongs to this fit; otherwise runs
    :func:`hierchoice.diagnostics.folder.check_folder` (which writes ``diagnostics.json`` and
    the diagnostic plots into the folder). Any problem — the checks module
    missing, or failing — gives ``verdict = "not checked"`` with the ``reason``;
    this function never raises because of the checks.

    Returns
    -------
    dict
        ``verdict`` (``"pass"``, ``"warn"``, ``"fail"`` or ``"not checked"``),
        ``checks`` (records with check, subject, value, threshold, verdict,
        advice), ``reason``, ``source`` and the rest of the diagnostics report
        (``predictive``, ``loo``, ``holdout``, ``plots``, ``notes``) when present.
    """
    folder = Path(folder)
    report: dict[str, Any] | None = None
    reasons: list[str] = []
    source = ""
    path = folder / "diagnostics.json"
    if path.exists():
        try:
            loaded = json.loads(path.read_text(encoding="utf-8"))
            if not isinstance(loaded, dict):
                raise ValueError("not a JSON object")
            if result is None or _same_fit(loaded, result):
                report, source = loaded, "diagnostics.json"
            else:
                reasons.append("diagnostics.json belongs to an earlier fit")
        except (OSError, ValueError) as err:
            reasons.append(f"diagnostics.json could not be read ({err})")
    if report is None:
        try:
            from ..diagnostics.folder import check_folder
        except Exception as err:  # the module is absent or broken: the report still gets written
            reasons.append(f"the convergence checks (hierchoice.checks) are not available ({type(err).__name__})")
        else:
            try:
                report, _code = check_folder(folder)
                source = "hierchoice.diagnostics.folder.check_folder"
            except Exception as err:  # a failing check must not stop the report
                log.warning("convergence checks failed: %s", err)
                reasons.append(f"the convergence checks failed: {type(err).__name__}: {err}")
    if report is None:
        return {"verdict": "not checked", "checks": [], "reason": "; ".join(reasons), "source": ""}
    checks = [c for c in report.get("checks", []) if isinstance(c, dict)]
    verdict = _normal_verdict(report.get("verdict"))
    if verdict == "not checked" and checks:
        verdicts = {_normal_verdict(c.get("verdict")) for c in checks}
        verdict = next((v for v in ("fail", "warn", "pass") if v in verdicts), "not checked")
    if verdict == "not checked":
        reasons.append("the diagnostics report gives no verdict")
    out = dict(report)
    out.update(verdict=verdict, checks=checks, reason="; ".join(reasons), source=source)
    return out


# --------------------------------------------------------------------------- plots


def _taste_plot(result: ChoiceFit, persons: pd.DataFrame | None, max_draws: int = 200) -> str | None:
    """Small multiples: the implied distribution across people of each random taste, with person means."""
    from scipy import stats

    layout = result.layout
    random = list(layout.random)
    if not random:
        return None
    post = result.posterior
    step = max(1, (post.sizes["chain"] * post.sizes["draw"]) // max_draws)
    mu_all = post["taste_mean"].sel(attribute=layout.names).stack(s=("chain", "draw")).values[:, ::step]  # (K, S)
    sd_all = post["taste_sd"].sel(random_attribute=layout.random_names).stack(
        s=("chain", "draw")).values[:, ::step]  # (R, S)
    n = len(random)
    cols = min(3, n)
    rows = int(np.ceil(n / cols))
    fig = _figure(3.6 * cols, 2.7 * rows)
    axes = fig.subplots(rows, cols, squeeze=False)
    for i, k in enumerate(random):
        ax = axes[i // cols][i % cols]
        name = layout.names[k]
        mu, sd = mu_all[k], sd_all[layout.random.index(k)]
        sign = layout.sign(k)
        med_mu, med_sd = float(np.median(mu)), float(np.median(sd))
        if layout.is_lognormal(k):
            lo, hi = np.exp(med_mu + med_sd * np.array([-2.8, 2.8]))
            lo, hi = sorted((sign * lo, sign * hi))
        else:
            lo, hi = med_mu - 3 * med_sd, med_mu + 3 * med_sd
        pm = None
        if persons is not None:
            pm = persons.loc[persons["attribute"] == name, "mean"].to_numpy()
            if pm.size:
                lo, hi = min(lo, float(pm.min())), max(hi, float(pm.max()))
        pad = 0.05 * (hi - lo if hi > lo else 1.0)
        x = np.linspace(lo - pad, hi + pad, 240)
        if layout.is_lognormal(k):
            y = np.zeros((mu.size, x.size))
            inside = sign * x > 0
            xs = np.abs(x[inside])
            y[:, inside] = stats.norm.pdf((np.log(xs)[None, :] - mu[:, None]) / sd[:, None]) / (sd[:, None] * xs)
        else:
            y = stats.norm.pdf(x[None, :], mu[:, None], np.maximum(sd[:, None], 1e-12))
        band = np.quantile(y, [0.05, 0.5, 0.95], axis=0)
        ax.fill_between(x, band[0], band[2], color="#23577a", alpha=0.22, lw=0, label="population (90 % band)")
        ax.plot(x, band[1], color="#23577a", lw=1.8, label="population (median)")
        top = float(band[1].max())
        if pm is not None and pm.size:
            counts, _, _ = ax.hist(pm, bins=min(30, max(8, pm.size // 6)), density=True, color="#d08c2f",
                                   alpha=0.55, label="respondents' posterior means")
            top = max(top, float(np.max(counts)))
        # draws with a tiny SD make needle-sharp densities; they would flatten everything else
        ax.set_ylim(0, 1.15 * top if top > 0 else 1.0)
        if x[0] < 0 < x[-1]:
            ax.axvline(0, color="#888", lw=0.8, ls="--")
        ax.set_title(_mpl_text(name), fontsize=10)
        ax.set_yticks([])
        ax.tick_params(labelsize=8)
        what = "WTP" if layout.wtp_space and k != layout.price else "coefficient"
        ax.set_xlabel(what, fontsize=8)
    for j in range(n, rows * cols):
        axes[j // cols][j % cols].set_visible(False)
    handles, labels = axes[0][0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncols=3, fontsize=8, frameon=False)
    return _png(fig, "Distribution of each random taste across people")


def _forest(labels: Sequence[str], mid: np.ndarray, lo: np.ndarray, hi: np.ndarray, *, xlabel: str,
            spread: tuple[np.ndarray, np.ndarray] | None = None, spread_label: str = "",
            interval_label: str = "", as_percent: bool = False) -> Any:
    n = len(labels)
    fig = _figure(7.6, 0.5 + 0.42 * n + 0.6)
    ax = fig.subplots()
    y = np.arange(n)[::-1]
    if spread is not None:
        ax.hlines(y, spread[0], spread[1], color="#d08c2f", lw=7, alpha=0.45, label=spread_label)
    ax.hlines(y, lo, hi, color="#23577a", lw=2.2, label=interval_label)
    ax.plot(mid, y, "o", color="#23577a", ms=5)
    ax.set_yticks(y)
    ax.set_yticklabels([_mpl_text(v) for v in labels], fontsize=9)
    left, right = ax.get_xlim()
    if left < 0 < right:
        ax.axvline(0, color="#888", lw=0.8, ls="--")
    if as_percent:
        ax.xaxis.set_major_formatter(lambda v, _pos: f"{100 * v:.0f} %")
    ax.set_xlabel(_mpl_text(xlabel), fontsize=9)
    ax.tick_params(axis="x", labelsize=8)
    ax.grid(axis="x", color="#e4e8ec", lw=0.6)
    if spread is not None or interval_label:
        fig.legend(loc="outside lower center", ncols=2, fontsize=8, frameon=False)
    return fig


def _caterpillar(result: ChoiceFit, persons: pd.DataFrame, max_panels: int = 4) -> str | None:
    names = [result.layout.names[k] for k in result.layout.random][:max_panels]
    if not names:
        return None
    cols = min(2, len(names))
    rows = int(np.ceil(len(names) / cols))
    fig = _figure(5.2 * cols, 2.8 * rows)
    axes = fig.subplots(rows, cols, squeeze=False)
    for i, name in enumerate(names):
        ax = axes[i // cols][i % cols]
        t = persons[persons["attribute"] == name].sort_values("mean")
        x = np.arange(len(t))
        ax.vlines(x, t["eti_low"], t["eti_high"], color="#23577a", alpha=0.35, lw=1)
        ax.plot(x, t["mean"], ".", color="#23577a", ms=3)
        ax.set_title(_mpl_text(name), fontsize=10)
        ax.set_xticks([])
        ax.set_xlabel("respondents, sorted by posterior mean", fontsize=8)
        ax.tick_params(labelsize=8)
        if t["eti_low"].min() < 0 < t["eti_high"].max():
            ax.axhline(0, color="#888", lw=0.8, ls="--")
    for j in range(len(names), rows * cols):
        axes[j // cols][j % cols].set_visible(False)
    return _png(fig, "Each respondent's posterior taste with its interval")


# --------------------------------------------------------------------------- sections


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
                         f"</strong> = {_e(_num(c.get('value')))} (rule: {_e(c.get('rule', c.get('threshold')))})"
                         f"{_e(advice)}</li>")
    reason = f"<p><strong>Why:</strong> {_e(status['reason'])}</p>" if verdict == "not checked" and status.get(
        "reason") else ""
    listing = f"<ul>{''.join(items)}</ul>" if items else ""
    return (f"<div class='verdict {cls}' role='status'><div class='head'>Convergence: {_e(head)}</div>"
            f"<div>{_e(text)}</div>{reason}{listing}</div>")


def _convergence_section(status: dict[str, Any], folder: Path) -> str:
    parts = []
    if not status["checks"]:
        why = f" ({status['reason']})" if status.get("reason") else ""
        parts.append(f"<p>No convergence checks are available for this fit{_e(why)}. Until they are run and pass, "
                     "treat every number in this report as provisional.</p>")
    if status["checks"]:
        rows = [[c.get("check", ""), c.get("subject", ""), _num(c.get("value")), c.get("rule", c.get("threshold", "")),
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


def _job_section(result: ChoiceFit, folder: Path) -> str:
    info, panel = result.info, result.panel
    s = panel.summary
    lo, med, hi = s.tasks_per_person
    created = str(result.posterior.attrs.get("created_at", ""))
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


def _population_section(result: ChoiceFit, table: pd.DataFrame, persons: pd.DataFrame | None, prob: float) -> str:
    layout = result.layout
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
        spread = f"{_num(p10['median'])} to {_num(p90['median'])}" if p10 and p90 else "everyone the same"
        rows.append([name, taste, _interval(mean) if mean else "", _interval(median) if median else "–",
                     _interval(sd) if sd else "0", spread, _interval(share, _pct) if share else ""])
    pct = f"{100 * prob:g} %"
    head = ["term", "taste", "mean across people", "median across people", "SD across people",
            "10 % – 90 % of people", "share with a positive β"]
    body = [
        f"<p>For each term, the distribution of the coefficient (in WTP space: of the willingness to pay) across "
        f"people implied by the posterior. Cells show the posterior median and, in brackets, the {pct} "
        "highest-density interval. The 10 %–90 % column is the posterior median of those quantiles: the spread of "
        "tastes between people, not uncertainty.</p>",
        _table(head, rows),
    ]
    if layout.shifted:
        body.append("<div class='note'>With covariates, these describe a person with the sample-average "
                    "covariates.</div>")
    corr = table[table["quantity"] == "correlation"]
    if len(corr):
        body.append("<h3>Correlations between random tastes</h3>")
        body.append(_table(["term", "with", f"correlation [{pct} HDI]"],
                           [[r["attribute"], r["other"], _interval(r)] for r in corr.to_dict("records")]))
    cov = table[table["quantity"] == "covariate_effect"]
    if len(cov):
        body.append("<h3>Covariate effects on the population means</h3>")
        body.append(_table(["term", "covariate", "scale", f"shift per unit [{pct} HDI]"],
                           [[r["attribute"], r["other"], r["scale"], _interval(r)] for r in cov.to_dict("records")]))
    plot = _taste_plot(result, persons)
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
    from ..analysis.wtp import person_wtp, population_wtp, price_attribute

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
    parts.append(_table(["term", "meaning", f"median across people [{pct} HDI]", "mean across people",
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
             "<strong>person_tastes.csv</strong> (one row per respondent and term). They combine the respondent's "
             "choices with the population distribution: with few choices per person, an estimate is pulled "
             "towards the population mean (shrinkage), so individual numbers are uncertain and should be read with "
             "their intervals.</p>"]
    shrink = taste_shrinkage(result)
    if len(shrink):
        rows = [[r["attribute"], r["scale"], _num(r["population_sd"]), _num(r["sd_of_person_means"]),
                 _num(r["spread_ratio"]), _num(r["person_sd"]), _pct(max(0.0, r["information"]))]
                for r in shrink.to_dict("records")]
        parts.append(_table(["term", "scale", "population SD", "SD of respondents' means", "ratio",
                             "typical person posterior SD", "share of spread explained by own choices"], rows,
                            numeric=[2, 3, 4, 5, 6]))
        parts.append("<p class='caption'>A ratio near 1 (and a share near 100 %) means respondents' own choices pin "
                     "down their tastes; near 0, individual estimates mostly repeat the population mean and should "
                     "not be used to tell people apart.</p>")
    plot = _caterpillar(result, persons)
    if plot:
        parts.append(plot)
        parts.append(f"<p class='caption'>Each respondent's posterior mean and {100 * prob:g} % equal-tailed "
                     "interval, sorted.</p>")
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
            pairs.append(("calibration error", _num(pred.get("calibration_error"))))
        shares = pred.get("shares")
        if isinstance(shares, list) and shares:
            outside = sum(bool(r.get("outside")) for r in shares if isinstance(r, dict))
            pairs.append(("observed shares outside their predictive interval", f"{outside} of {len(shares)}"))
        if pairs:
            parts.append("<h3>Posterior-predictive checks</h3>" + _kv(pairs))
        if isinstance(shares, list) and shares:
            rows = [[r.get("statistic", ""), r.get("attribute", ""), r.get("level", ""), _pct(r.get("observed")),
                     f"{_pct(r.get('lower'))} – {_pct(r.get('upper'))}", "yes" if r.get("outside") else ""]
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
    return "".join(parts) or None


def _generic_table(value: Any) -> str:
    """A table for a diagnostics entry of unknown shape: records, a mapping of mappings, or key-value pairs."""
    if isinstance(value, dict) and isinstance(value.get("table"), (list, dict)):
        value = value["table"]
    if isinstance(value, list) and value and all(isinstance(r, dict) for r in value):
        cols = list(dict.fromkeys(k for r in value for k in r))
        return _table(cols, [[_num(r.get(c)) if isinstance(r.get(c), (int, float)) else r.get(c, "")
                              for c in cols] for r in value])
    if isinstance(value, dict) and value and all(isinstance(v, dict) for v in value.values()):
        cols = list(dict.fromkeys(k for v in value.values() for k in v))
        return _table(["", *cols], [[k, *[_num(v.get(c)) if isinstance(v.get(c), (int, float)) else v.get(c, "")
                                          for c in cols]] for k, v in value.items()])
    if isinstance(value, dict):
        return _kv([(k, _num(v) if isinstance(v, (int, float)) else v) for k, v in value.items()])
    return f"<p>{_e(value)}</p>"


def _scenario_section(result: ChoiceFit, market: Any, prob: float, csv: dict[str, pd.DataFrame]) -> str:
    from ..analysis.shares import (
        PERSONS,
        elasticities,
        predict_shares,
        read_market,
        sensitivity,
    )
    from ..analysis.wtp import price_attribute

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
                      _table([f"{price} of", "share of", "kind", f"elasticity [{pct} HDI]"], rows),
                      f"<p class='caption'>The % change in the share of an alternative for a 1 % rise in the {_e(price)} "
                      "of one alternative (own: its own share; cross: the others').</p>"]
            first = str(el["changed"].iloc[0])
            curve = sensitivity(result, frame, alternative=first, attribute=price, prob=prob)
            parts.append(_sensitivity_plot(curve, price, first))
    return "".join(parts)


def _sensitivity_plot(curve: pd.DataFrame, attribute: str, changed: str) -> str:
    fig = _figure(7.6, 3.6)
    ax = fig.subplots()
    colours = ["#23577a", "#d08c2f", "#5b8c3a", "#8e4585", "#777777", "#b5482b"]
    for i, (alt, part) in enumerate(curve.groupby("alternative", sort=False)):
        c = colours[i % len(colours)]
        x = part["value"].astype(float).to_numpy()
        ax.fill_between(x, part["hdi_low"], part["hdi_high"], color=c, alpha=0.18, lw=0)
        ax.plot(x, part["median"], color=c, lw=1.8, label=_mpl_text(alt))
    ax.yaxis.set_major_formatter(lambda v, _pos: f"{100 * v:.0f} %")
    ax.set_xlabel(_mpl_text(f"{attribute} of {changed} (over the design's range)"), fontsize=9)
    ax.set_ylabel("predicted share", fontsize=9)
    ax.tick_params(labelsize=8)
    ax.grid(color="#e4e8ec", lw=0.6)
    ax.legend(fontsize=8, frameon=False)
    return (_png(fig, f"Shares as {attribute} of {changed} changes")
            + f"<p class='caption'>Shares as the {_e(attribute)} of {_e(changed)} moves over the range of the design, "
              "the rest of the market fixed (median and 90 % band; new people from the population).</p>")


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
    "Willingness to pay is a ratio of two coefficients; where the price coefficient can be near zero its means are "
    "withheld and only medians and quantiles are reported.",
]


def _cautions_section() -> str:
    return "<ul>" + "".join(f"<li>{_e(c)}</li>" for c in _CAUTIONS) + "</ul>"


# --------------------------------------------------------------------------- the report


def write_report(folder: str | Path, *, market: pd.DataFrame | str | Path | None = None,
                 prob: float = DEFAULT_PROB) -> Path:
    """Write ``report.html`` and its CSV tables into a results folder.

    Parameters
    ----------
    folder : path
        A results folder written by :func:`hierchoice.save_fit`.
    market : DataFrame or path, optional
        A market scenario (see :mod:`hierchoice.shares`) whose predicted shares,
        elasticities and price sensitivity the report shows; ``shares.csv`` is
        written with it.
    prob : float, default 0.9
        Probability mass of the credible intervals.

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
    from ..inference.results import load_fit

    prob = check_prob(prob)
    folder = Path(folder)
    result = load_fit(folder)
    status = convergence_status(folder, result)
    provisional = status["verdict"] in ("fail", "not checked")
    csv: dict[str, pd.DataFrame] = {}

    pop = population_tastes(result, prob=prob)
    csv["population_tastes.csv"] = pop
    persons = person_tastes(result, prob=prob) if result.has_person_draws else None
    if persons is not None:
        csv["person_tastes.csv"] = persons
    sections: list[tuple[str, str, str, bool]] = [
        ("convergence", "Convergence", _convergence_section(status, folder), False),
        ("job", "Job and data", _job_section(result, folder), False),
        ("model", "The model", _model_section(result), False),
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
    sections.append(("cautions", "Cautions", _cautions_section(), False))
    files = sorted([REPORT_FILE, *csv])
    sections.append(("files", "Files", "<p>Written beside this report:</p><ul>"
                     + "".join(f"<li>{_e(f)}</li>" for f in files) + "</ul>", False))

    for name, table in csv.items():
        write_with(folder / name, lambda tmp, t=table: t.to_csv(tmp, index=False, encoding="utf-8"))
    page = _page(result, folder, status, sections)
    return atomic_write_text(folder / REPORT_FILE, page)


def _page(result: ChoiceFit, folder: Path, status: dict[str, Any],
          sections: Sequence[tuple[str, str, str, bool]]) -> str:
    from .._version import __version__

    title = f"Choice model results: {folder.resolve().name}"
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
