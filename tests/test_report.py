"""The HTML report: self-contained, escaped, verdict first, and honest when convergence is unknown."""

from __future__ import annotations

import json
import sys
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from test_checks import ref_ess_bulk, ref_ess_tail, ref_rhat
from test_tastes import fake_fit, small_panel

import hierchoice as hc
import hierchoice.report.markup as report_module
from hierchoice import SimAttribute, SpecError
from hierchoice.report import REPORT_FILE, convergence_status, write_report

VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}


class _Collector(HTMLParser):
    """Every tag and attribute, and whether open and close tags nest properly (html.parser, stdlib)."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.stack: list[str] = []
        self.mismatched: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))
        if tag not in VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag: str) -> None:
        if not self.stack or self.stack[-1] != tag:
            self.mismatched.append(tag)
        else:
            self.stack.pop()

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def parse(page: str) -> _Collector:
    parser = _Collector()
    parser.feed(page)
    parser.close()
    return parser


def assert_self_contained(page: str) -> _Collector:
    """The checks of an offline, self-contained page; returns the parse."""
    doc = parse(page)
    assert doc.mismatched == [] and doc.stack == [], (doc.mismatched, doc.stack)
    names = {t for t, _ in doc.tags}
    assert not names & {"script", "link", "iframe", "object", "embed", "base"}, names
    for tag, attrs in doc.tags:
        for key in ("src", "href"):
            value = attrs.get(key)
            if value is None:
                continue
            if key == "src":
                assert value.startswith("data:image/png;base64,"), (tag, value[:60])
            else:
                assert value.startswith("#"), (tag, value)
    lowered = page.lower()
    for needle in ("<script", "@import", "url(", "http://", "https://", "//fonts.", "src=\"http", "href=\"http"):
        assert needle not in lowered, needle
    return doc


# --------------------------------------------------------------------------- one real fit, hostile names


@pytest.fixture(scope="module")
def hostile(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    attrs = [
        SimAttribute("price", levels=[1.0, 2.0, 3.0, 4.0], taste="lognormal", mean=0.0, sd=0.3, sign="negative"),
        SimAttribute("<script>", levels=[0.0, 1.0, 2.0], taste="normal", mean=0.6, sd=0.3),
    ]
    sim = hc.simulate_panel(attrs, n_persons=60, n_tasks=6, alternatives=("plain", "a&b", "<i>c</i>"), seed=5)
    sim.spec["model"] = {"price": "price"}
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    result = hc.fit(panel, draws=150, tune=150, chains=2, seed=2, backend="nutpie", progressbar=False)
    folder = hc.save_fit(result, tmp_path_factory.mktemp("hostile") / "results")
    market = pd.DataFrame({"option": ["plain", "a&b", "<i>c</i>"], "price": [2.0, 3.0, 2.5],
                           "<script>": [1.0, 2.0, 0.0]})
    path = write_report(folder, market=market)
    return {"folder": folder, "path": path, "page": path.read_text(encoding="utf-8")}


def test_report_parses_and_is_self_contained(hostile: dict[str, Any]) -> None:
    assert hostile["path"] == hostile["folder"] / REPORT_FILE
    doc = assert_self_contained(hostile["page"])
    assert any(t == "img" for t, _ in doc.tags)  # plots are there, embedded


def test_report_escapes_user_names(hostile: dict[str, Any]) -> None:
    page = hostile["page"]
    assert "&lt;script&gt;" in page
    assert "a&amp;b" in page and "&lt;i&gt;c&lt;/i&gt;" in page
    assert "<i>c</i>" not in page
    # the parsed text shows the names as written
    text = "".join(parse(page).text)
    assert "<script>" in text and "<i>c</i>" in text


def test_report_puts_the_verdict_first_and_marks_provisional_sections(hostile: dict[str, Any]) -> None:
    page = hostile["page"]
    status = convergence_status(hostile["folder"])
    assert (hostile["folder"] / "diagnostics.json").exists()  # the real checks ran and wrote it
    # the verdict the published rules give, from numbers computed here: rank-normalised split-R-hat and bulk / tail
    # ESS written from Vehtari et al. (2021) in test_checks.py, divergences counted, E-BFMI by its formula
    # (Betancourt 2016, arXiv:1604.00695, eq. 3.1: sum of squared energy changes over the energy's sum of
    # squares, per chain). Fail lines (hierchoice.diagnostics.checks): R-hat >= 1.05 on any population parameter
    # or person taste, bulk or tail ESS < 100, any divergence, E-BFMI < 0.3. (This fit, 2 chains x 150 draws,
    # fails on the taste SDs' ESS: 78 and 52 measured.)
    fit = hc.load_fit(hostile["folder"])
    post, sample_stats = fit.posterior, fit.idata.sample_stats
    population = [post["taste_mean"].sel(attribute=a).values for a in post["attribute"].values]
    population += [post["taste_sd"].sel(random_attribute=a).values for a in post["random_attribute"].values]
    persons = post["person_taste"].values  # (chain, draw, person, attribute)
    worst_rhat = max([ref_rhat(x) for x in population] +
                     [ref_rhat(persons[:, :, p, k]) for p in range(persons.shape[2]) for k in range(persons.shape[3])])
    worst_ess = min(min(ref_ess_bulk(x), ref_ess_tail(x)) for x in population)
    energy = sample_stats["energy"].values
    ebfmi = (np.diff(energy, axis=1) ** 2).sum(axis=1) / ((energy - energy.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
    fails = worst_rhat >= 1.05 or worst_ess < 100 or int(sample_stats["diverging"].sum()) > 0 or ebfmi.min() < 0.3
    # warn lines: R-hat >= 1.01 or ESS < 400 (other checks, e.g. the tree depth, may only add warnings)
    warns = worst_rhat >= 1.01 or worst_ess < 400
    if fails:
        assert status["verdict"] == "fail", (status["verdict"], worst_rhat, worst_ess)
        assert "NOT converged" in page[page.index("class='verdict"):page.index("<section")]
    else:
        assert status["verdict"] == "warn" if warns else status["verdict"] in ("pass", "warn")
    first_section = page.index("<section")
    assert page.index("class='verdict") < first_section
    for anchor in ("convergence", "job", "model", "tastes", "wtp", "individual", "fit", "scenario", "cautions"):
        assert f"<section id='{anchor}'>" in page
    tastes = page[page.index("<section id='tastes'>"):page.index("<section id='wtp'>")]
    assert ("provisional" in tastes) == (status["verdict"] == "fail")
    for caution in ("not a forecast guarantee", "conditional on the model", "outside the ranges of the design",
                    "Check convergence before reading any result"):
        assert caution in page


def test_report_writes_the_csv_tables(hostile: dict[str, Any]) -> None:
    folder = hostile["folder"]
    for name in ("population_tastes.csv", "person_tastes.csv", "wtp.csv", "person_wtp.csv", "shares.csv"):
        assert (folder / name).is_file(), name
    pop = pd.read_csv(folder / "population_tastes.csv")
    assert "<script>" in set(pop["attribute"])
    shares = pd.read_csv(folder / "shares.csv")
    assert set(shares["persons"]) == {"population", "panel"}
    assert shares.groupby("persons")["mean"].sum().to_numpy() == pytest.approx([1.0, 1.0])
    persons = pd.read_csv(folder / "person_tastes.csv")
    assert len(persons) == 60 * 2


def test_report_job_title_files_and_values(hostile: dict[str, Any]) -> None:
    import datetime as dt
    import re

    page, folder = hostile["page"], hostile["folder"]
    # "fitted" holds the fit's time (written at fit time), not an empty cell
    fitted = re.search(r"<th>fitted</th><td>([^<]*)</td>", page)
    assert fitted and re.fullmatch(r"\d{4}-\d\d-\d\d \d\d:\d\d UTC", fitted.group(1)), fitted
    made = dt.datetime.strptime(fitted.group(1), "%Y-%m-%d %H:%M UTC").replace(tzinfo=dt.timezone.utc)
    assert abs((dt.datetime.now(dt.timezone.utc) - made).total_seconds()) < 3 * 3600
    # the folder is called "results": the title names what holds it, not "results: results"
    assert folder.name == "results"
    assert f"<title>Choice model results: {folder.parent.name}</title>" in page
    # the Files section lists every file the folder holds (plots, diagnostics, the fit itself)
    files = page[page.index("<section id='files'>"):]
    listed = set(re.findall(r"<li><code>([^<]+)</code>", files))
    held = {p.name for p in folder.iterdir() if not p.name.startswith(".")}
    assert listed == held and {"posterior.nc", "diagnostics.json", "rank.png", "report.html"} <= listed
    # an R-hat is shown as the checks format it (three decimals), never rounded onto its threshold
    status = convergence_status(folder)
    rhat = next(c for c in status["checks"] if c["check"] == "rhat")
    assert f"<td class='num'>{rhat['shown']}</td>" in page and len(rhat["shown"].split(".")[1]) >= 3


# --------------------------------------------------------------------------- the numbers in the report


class _TableReader(HTMLParser):
    """Every <table> of a page as (header cells, body rows of cell texts) (html.parser, stdlib)."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tables: list[tuple[list[str], list[list[str]]]] = []
        self._row: list[str] | None = None
        self._cell: list[str] | None = None
        self._head = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag == "table":
            self.tables.append(([], []))
        elif tag == "thead":
            self._head = True
        elif tag == "tr":
            self._row = []
        elif tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag: str) -> None:
        if tag == "thead":
            self._head = False
        elif tag in ("td", "th") and self._cell is not None and self._row is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        elif tag == "tr" and self._row is not None and self.tables:
            head, body = self.tables[-1]
            if self._head:
                head.extend(self._row)
            else:
                body.append(self._row)
            self._row = None

    def handle_data(self, data: str) -> None:
        if self._cell is not None:
            self._cell.append(data)


def _section_tables(page: str, anchor: str) -> list[pd.DataFrame]:
    start = page.index(f"<section id='{anchor}'>")
    reader = _TableReader()
    reader.feed(page[start:page.index("</section>", start)])
    return [pd.DataFrame(body, columns=head) for head, body in reader.tables if head]


def _number(text: str) -> float:
    """A number as the report prints it: '1,234', '-0.0512', '3.00e-06' or '45.7 %' (a share)."""
    text = text.strip()
    if text.endswith("%"):
        return float(text[:-1].strip()) / 100
    return float(text.replace(",", ""))


def _split_interval_text(text: str) -> tuple[str, str, str]:
    """'median [low, high]' as the report prints an interval cell -> the three numbers' texts."""
    median, rest = text.split("[")
    low, high = rest.rstrip("]").split(", ")
    return median.strip(), low.strip(), high.strip()


def _printed(value: float, text: str) -> bool:
    """Whether ``text`` is ``value`` as the report rounds it: 3 significant digits (at most 0.5 in the third, so a
    relative error <= 5e-3), whole numbers above 1,000, or a percentage with one decimal (0.05 percentage points)."""
    shown = _number(text)
    if text.strip().endswith("%"):
        return abs(shown - value) <= 0.0005 + 1e-12
    return abs(shown - value) <= 5e-3 * abs(value) + 0.5 * (abs(value) >= 1000) + 1e-12


def _hdi(draws: np.ndarray, prob: float) -> tuple[float, float]:
    """The narrowest interval spanning floor(prob n) + 1 of the n sorted draws (Chen & Shao 1999, Journal of
    Computational and Graphical Statistics 8(1): the shortest interval among those holding the share prob)."""
    x = np.sort(draws.ravel())
    k = int(np.floor(prob * len(x)))
    i = int(np.argmin(x[k:] - x[: len(x) - k]))
    return float(x[i]), float(x[i + k])


def test_report_population_table_equals_the_csv_and_the_posterior(hostile: dict[str, Any]) -> None:
    folder, page = hostile["folder"], hostile["page"]
    csv = pd.read_csv(folder / "population_tastes.csv").set_index(["quantity", "attribute"])
    # the CSV against the fit's own draws: each quantity per posterior draw from its textbook distribution
    # (scipy.stats.lognorm for the lognormal price taste, -exp(eta); scipy.stats.norm for the normal one)
    post = hc.load_fit(folder).posterior
    prob = float(csv["prob"].iloc[0])
    for name, lognormal in (("price", True), ("<script>", False)):
        mu = post["taste_mean"].sel(attribute=name).values.ravel()
        sd = post["taste_sd"].sel(random_attribute=name).values.ravel()
        if lognormal:
            ln = stats.lognorm(s=sd, scale=np.exp(mu))  # the coefficient is -1 times this variable
            implied = {"mean_across_people": -ln.mean(), "median_across_people": -ln.median(),
                       "sd_across_people": ln.std(), "p10_across_people": -ln.ppf(0.9),
                       "p90_across_people": -ln.ppf(0.1), "share_positive": np.zeros_like(mu)}
        else:
            nd = stats.norm(mu, sd)
            implied = {"mean_across_people": nd.mean(), "median_across_people": nd.median(),
                       "sd_across_people": nd.std(), "p10_across_people": nd.ppf(0.1),
                       "p90_across_people": nd.ppf(0.9), "share_positive": nd.sf(0.0)}
        implied |= {"population_mean": mu, "population_sd": sd}
        for quantity, draws in implied.items():
            row = csv.loc[(quantity, name)]
            assert row["median"] == pytest.approx(np.median(draws), rel=1e-9, abs=1e-12), (quantity, name)
            assert row["mean"] == pytest.approx(np.mean(draws), rel=1e-9, abs=1e-12), (quantity, name)
            assert row["eti_low"] == pytest.approx(np.quantile(draws, (1 - prob) / 2), rel=1e-9, abs=1e-12)
            assert (row["hdi_low"], row["hdi_high"]) == pytest.approx(_hdi(draws, prob), rel=1e-9, abs=1e-12), \
                (quantity, name)
    # the report's table against the CSV, cell by cell (numbers as printed)
    (table, *_) = _section_tables(page, "tastes")
    table = table.set_index("term")
    assert set(table.index) == {"price", "<script>"}
    cells = {"mean across people": "mean_across_people", "median across people": "median_across_people",
             "SD across people": "sd_across_people", "share with a positive value": "share_positive"}
    for name in table.index:
        for column, quantity in cells.items():
            row = csv.loc[(quantity, name)]
            for value, text in zip((row["median"], row["hdi_low"], row["hdi_high"]),
                                   _split_interval_text(table.loc[name, column])):
                assert _printed(value, text), (name, column, value, text)
        low, high = table.loc[name, "10 % – 90 % of people"].split(" to ")
        assert _printed(csv.loc[("p10_across_people", name), "median"], low)
        assert _printed(csv.loc[("p90_across_people", name), "median"], high)



def test_report_wtp_and_share_tables_equal_the_csvs(hostile: dict[str, Any]) -> None:
    folder, page = hostile["folder"], hostile["page"]
    wtp = pd.read_csv(folder / "wtp.csv").set_index(["quantity", "attribute"])
    (table, *_) = _section_tables(page, "wtp")
    assert list(table["term"]) == ["<script>"]
    for column, quantity in (("median across people", "median_across_people"),
                             ("mean across people", "mean_across_people")):
        col = next(c for c in table.columns if c.startswith(column))
        row = wtp.loc[(quantity, "<script>")]
        for value, text in zip((row["median"], row["hdi_low"], row["hdi_high"]),
                               _split_interval_text(table[col].iloc[0])):
            assert _printed(value, text), (column, value, text)
    shares = pd.read_csv(folder / "shares.csv")
    tables = _section_tables(page, "scenario")
    predicted = next(t for t in tables if t.columns[0] == "alternative")
    assert list(predicted["alternative"]) == ["plain", "a&b", "<i>c</i>"]
    for persons, prefix in (("population", "share: new people"), ("panel", "share: the survey")):
        col = next(c for c in predicted.columns if c.startswith(prefix))
        expected = shares[shares["persons"] == persons].set_index("alternative")
        for alt, text in zip(predicted["alternative"], predicted[col]):
            row = expected.loc[alt]
            for value, part in zip((row["median"], row["hdi_low"], row["hdi_high"]), _split_interval_text(text)):
                assert _printed(value, part), (persons, alt, value, part)


def test_old_diagnostics_without_shown_values_are_formatted(fake_folder: Path) -> None:
    report = {"verdict": "fail", "checks": [{"check": "rhat", "subject": "taste_sd", "value": 1.012,
                                             "threshold": 1.01, "rule": "value < 1.01", "verdict": "warn"}]}
    (fake_folder / "diagnostics.json").write_text(json.dumps(report))
    page = write_report(fake_folder).read_text(encoding="utf-8")
    assert "1.012" in page and "= 1.01 (" not in page


# --------------------------------------------------------------------------- convergence unknown or failed (fake fits)


@pytest.fixture
def fake_folder(tmp_path: Path) -> Path:
    panel = small_panel(model={"price": "price"})
    fit = fake_fit(panel, {"price": 0.0, "time": -0.05}, {"price": 0.3, "time": 0.02}, spread=0.01)
    return hc.save_fit(fit, tmp_path / "results")


def _sections_after_job(page: str) -> list[str]:
    out = []
    for anchor in ("tastes", "wtp", "individual", "fit"):
        start = page.index(f"<section id='{anchor}'>")
        out.append(page[start:page.index("</h2>", start)])
    return out


def test_failing_checks_module_gives_not_checked(fake_folder: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import hierchoice.diagnostics.folder

    def broken(folder: Any, *, out: Any = None, result: Any = None) -> Any:
        raise RuntimeError("disk on fire")

    monkeypatch.setattr(hierchoice.diagnostics.folder, "check_folder", broken)
    page = write_report(fake_folder).read_text(encoding="utf-8")
    assert_self_contained(page)
    banner = page[page.index("class='verdict"):page.index("<section")]
    assert "Convergence: not checked" in banner and "disk on fire" in banner
    assert all("provisional" in head for head in _sections_after_job(page))


def test_missing_checks_module_gives_not_checked(fake_folder: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(sys.modules, "hierchoice.diagnostics.folder", None)  # import now raises ImportError
    status = convergence_status(fake_folder)
    assert status["verdict"] == "not checked" and "not available" in status["reason"]
    page = write_report(fake_folder).read_text(encoding="utf-8")
    assert page.index("Convergence: not checked") < page.index("<section")


def _diagnostics(folder: Path, verdict: str, **fit: Any) -> None:
    info = hc.load_fit(folder).info | fit
    checks = [{"check": "rhat", "subject": "taste_sd[time]", "value": 1.2, "threshold": 1.01,
               "rule": "value < 1.01", "verdict": verdict, "advice": "Run longer <and> check the trace plots."}]
    (folder / "diagnostics.json").write_text(json.dumps({"verdict": verdict, "checks": checks, "fit": info,
                                                         "holdout": [{"model": "mixed", "hit_rate": 0.61}]}))


def test_failed_verdict_is_prominent(fake_folder: Path) -> None:
    _diagnostics(fake_folder, "fail")
    page = write_report(fake_folder).read_text(encoding="utf-8")
    banner = page[page.index("class='verdict"):page.index("<section")]
    assert "NOT converged" in banner and "provisional" in banner
    assert "Run longer &lt;and&gt; check the trace plots." in banner
    assert all("provisional" in head for head in _sections_after_job(page))
    assert "Holdout tasks" in page and "0.61" in page


def test_passing_verdict_and_stale_diagnostics(fake_folder: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    _diagnostics(fake_folder, "pass")
    page = write_report(fake_folder).read_text(encoding="utf-8")
    assert "Convergence: Converged" in page and not any("provisional" in h for h in _sections_after_job(page))
    # a diagnostics.json from another fit is not trusted: the checks run again
    _diagnostics(fake_folder, "pass", wall_seconds=123.0)
    calls = []
    import hierchoice.diagnostics.folder

    def fake_check(folder: Any, *, out: Any = None, result: Any = None) -> Any:
        calls.append(folder)
        return {"verdict": "warn", "checks": []}, 0

    monkeypatch.setattr(hierchoice.diagnostics.folder, "check_folder", fake_check)
    assert convergence_status(fake_folder, hc.load_fit(fake_folder))["verdict"] == "warn" and calls


def test_report_without_price_or_person_draws(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(sys.modules, "hierchoice.diagnostics.folder", None)
    fit = fake_fit(small_panel(), {"price": 0.0, "time": -0.05}, {"price": 0.3, "time": 0.02},
                   person_draws=False)
    folder = hc.save_fit(fit, tmp_path / "results")
    page = write_report(folder).read_text(encoding="utf-8")
    assert_self_contained(page)
    assert "No price attribute is named" in page and "kept no person draws" in page
    assert not (folder / "wtp.csv").exists() and not (folder / "person_tastes.csv").exists()
    assert (folder / "population_tastes.csv").exists()
    with pytest.raises(SpecError, match="prob"):
        write_report(folder, prob=90)


def test_report_module_numbers_are_readable() -> None:
    assert report_module._num(-0.05123) == "-0.0512" and report_module._num(2.5) == "2.5"
    assert report_module._num(1234.4) == "1,234" and report_module._num(3e-6) == "3.00e-06"
    assert report_module._num(float("nan")) == "–" and report_module._pct(0.4567) == "45.7 %"
    assert report_module._mpl_text("$x$") == r"\$x\$"
