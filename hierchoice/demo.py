"""The demo: the whole job on the invented Harbourline commuter-ferry survey."""

from __future__ import annotations

from pathlib import Path

from ._args import whole_number
from ._io import atomic_write_text, make_folder, write_with
from .data.panel import ChoicePanel
from .simulate import ferry_scenario
from .spec import Spec, dumps_toml

__all__ = ["write_demo_data", "run_demo"]


def write_demo_data(out: Path, *, persons: int = 300, seed: int = 7) -> tuple[Path, Path]:
    """Write the demo survey (``harbourline.csv``) and its spec (``harbourline.toml``) into ``out``."""
    whole_number(persons, "persons (respondents to simulate)")  # before a folder is made
    out = make_folder(out, "demo")
    sim = ferry_scenario(n_persons=persons, seed=seed, correlated=DEMO_CORRELATED)
    sim.spec["sampling"] = dict(DEMO_SAMPLING)
    data_path = write_with(out / "harbourline.csv", lambda tmp: sim.data.to_csv(tmp, index=False))
    header = (
        "# Harbourline commuter-ferry survey (invented demo data made by hierchoice.simulate).\n"
        "# Each respondent chose between two ferry options and keeping their current commute ('none').\n\n"
    )
    spec_path = atomic_write_text(out / "harbourline.toml", header + dumps_toml(sim.spec))
    Spec.from_toml(spec_path)  # what we wrote must read back
    return data_path, spec_path


#: The demo's tastes are independent across people: with 300 respondents the correlations mix so slowly that
#: 2 chains x 1000 draws ended with R-hat 1.014-1.035 and bulk ESS 138-191 for a correlation (seeds 1, 2), a WARN
#: on the first run a user sees. Independent tastes with these settings pass every check (docs/demo.md).
DEMO_CORRELATED = False
#: Sampling settings written into harbourline.toml (measured in docs/demo.md).
DEMO_SAMPLING = {"chains": 2, "draws": 2000, "tune": 1000}

DEMO_MARKET = """option,fare,crossing_time,departures_per_hour,deck
ferry_a,3.5,20,4,covered
ferry_b,5.0,15,2,lounge
none,,,,
"""


def run_demo(out: Path, *, persons: int = 300, quick: bool = False, seed: int = 7) -> Path:
    """The whole job on the demo: simulate, validate, fit, check, report. Returns the report's path."""
    from .diagnostics.folder import check_folder, format_verdict
    from .inference.results import save_fit
    from .inference.sampling import fit
    from .report.html import write_report

    out = Path(out)
    if quick:
        print("--quick: a smoke run with very few draws. Expect the convergence check to FAIL; do not read its "
              "numbers. Run without --quick for a real fit.\n", flush=True)
    data_path, spec_path = write_demo_data(out, persons=persons, seed=seed)
    market_path = atomic_write_text(out / "harbourline_market.csv", DEMO_MARKET)
    spec = Spec.from_toml(spec_path)
    panel = ChoicePanel.from_file(data_path, spec)
    print(f"1/4 validated {data_path}\n{panel.summary}\n", flush=True)
    draws = dict(draws=60, tune=60) if quick else {}
    print("2/4 fitting the hierarchical logit with NUTS (draws and chains from the spec)...", flush=True)
    result = fit(panel, spec, progressbar=True, **draws)
    results = save_fit(result, out / "results")
    print(f"    {result!r} in {result.info['wall_seconds']:.0f} s -> {results}/\n", flush=True)
    print("3/4 checking convergence and predictions...", flush=True)
    report, code = check_folder(results)
    print(format_verdict(report) + "\n", flush=True)
    print("4/4 writing the report...", flush=True)
    path = write_report(results, market=market_path, title="Harbourline commuter-ferry survey (demo)")
    print(f"\nreport: {path}")
    if quick:
        print("(--quick: a smoke run with very few draws; do not read its numbers)")
    return path
