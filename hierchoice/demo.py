"""The demo: the whole job on the invented Harbourline commuter-ferry survey."""

from __future__ import annotations

from pathlib import Path

from .panel import ChoicePanel
from .simulate import ferry_scenario
from .spec import Spec, dumps_toml
from ._io import atomic_write_text, write_with

__all__ = ["write_demo_data", "run_demo"]


def write_demo_data(out: Path, *, persons: int = 300, seed: int = 7) -> tuple[Path, Path]:
    """Write the demo survey (``harbourline.csv``) and its spec (``harbourline.toml``) into ``out``."""
    sim = ferry_scenario(n_persons=persons, seed=seed)
    out.mkdir(parents=True, exist_ok=True)
    data_path = write_with(out / "harbourline.csv", lambda tmp: sim.data.to_csv(tmp, index=False))
    header = (
        "# Harbourline commuter-ferry survey (invented demo data made by hierchoice.simulate).\n"
        "# Each respondent chose between two ferry options and keeping their current commute ('none').\n\n"
    )
    spec_path = atomic_write_text(out / "harbourline.toml", header + dumps_toml(sim.spec))
    Spec.from_toml(spec_path)  # what we wrote must read back
    return data_path, spec_path


def run_demo(out: Path, *, persons: int = 300, quick: bool = False, seed: int = 7) -> Path:
    """Simulate, validate and (later stages) fit, check and report the demo; return ``out``."""
    data_path, spec_path = write_demo_data(out, persons=persons, seed=seed)
    spec = Spec.from_toml(spec_path)
    panel = ChoicePanel.from_file(data_path, spec)
    print(f"demo data: {data_path}\ndemo spec: {spec_path}")
    print(panel.summary)
    return out
