"""The demo's first run passes its own checks with its default settings (slow: one full demo fit)."""

from __future__ import annotations

from pathlib import Path

import pytest

import hierchoice as hc
from hierchoice.demo import DEMO_SAMPLING, write_demo_data
from hierchoice.diagnostics.checks import convergence_checks
from hierchoice.diagnostics.folder import closing_line


def test_demo_spec_carries_its_sampling_settings(tmp_path: Path) -> None:
    _, spec_path = write_demo_data(tmp_path / "demo", persons=20)
    spec = hc.Spec.from_toml(spec_path)
    assert (spec.sampling.chains, spec.sampling.draws, spec.sampling.tune) == (
        DEMO_SAMPLING["chains"], DEMO_SAMPLING["draws"], DEMO_SAMPLING["tune"])
    assert not spec.model.correlated


@pytest.mark.slow
def test_the_demo_fit_passes_every_convergence_check(tmp_path: Path) -> None:
    # the issue: the demo's own settings ended with a WARN (R-hat 1.012-1.035, bulk ESS 138-320 for a taste SD
    # and a correlation); the first run a user sees must pass. Fixed seeds: the same fit every run.
    data, spec = write_demo_data(tmp_path / "demo")
    panel = hc.ChoicePanel.from_file(data, hc.Spec.from_toml(spec))
    result = hc.fit(panel, progressbar=False)
    checks = convergence_checks(result)
    bad = [(c.check, c.subject, c.value) for c in checks if c.verdict != "pass"]
    assert bad == []
    assert closing_line({"checks": [c.to_dict() for c in checks], "exit_code": 0}) == "every convergence check passed"
