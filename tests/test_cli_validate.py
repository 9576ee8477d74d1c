"""``hierchoice validate``: a summary and exit 0 on good input, a clear message and exit 2 on bad."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path
from typing import Any

import pandas as pd
import pytest

from hierchoice.cli import EXIT_BAD_INPUT, main
from hierchoice.spec import dumps_toml


def _write(tmp_path: Path, table: pd.DataFrame, spec: dict[str, Any] | str) -> tuple[str, str]:
    data = tmp_path / "choices.csv"
    table.to_csv(data, index=False)
    spec_path = tmp_path / "spec.toml"
    spec_path.write_text(spec if isinstance(spec, str) else dumps_toml(spec))
    return str(data), str(spec_path)


def test_validate_good_file(tmp_path: Path, capsys: pytest.CaptureFixture[str], simple_long: pd.DataFrame,
                            simple_spec: dict[str, Any]) -> None:
    data, spec = _write(tmp_path, simple_long, simple_spec)
    assert main(["validate", data, "--spec", spec]) == 0
    out, err = capsys.readouterr()
    assert f"{data}: valid choice panel" in out
    assert "persons              2" in out and "choice tasks         4" in out
    assert "model attributes     fare, minutes" in out
    assert err == ""


def test_validate_parquet(tmp_path: Path, capsys: pytest.CaptureFixture[str], simple_long: pd.DataFrame,
                          simple_spec: dict[str, Any]) -> None:
    _, spec = _write(tmp_path, simple_long, simple_spec)
    data = tmp_path / "choices.parquet"
    simple_long.to_parquet(data)
    assert main(["validate", str(data), "--spec", spec]) == 0
    assert "valid choice panel" in capsys.readouterr().out


def test_validate_missing_column(tmp_path: Path, capsys: pytest.CaptureFixture[str], simple_long: pd.DataFrame,
                                 simple_spec: dict[str, Any]) -> None:
    data, spec = _write(tmp_path, simple_long.drop(columns="minutes"), simple_spec)
    assert main(["validate", data, "--spec", spec]) == EXIT_BAD_INPUT == 2
    out, err = capsys.readouterr()
    assert "'minutes'" in err and "Missing column" in err
    assert "Traceback" not in err and out == ""


def test_validate_bad_spec_key(tmp_path: Path, capsys: pytest.CaptureFixture[str], simple_long: pd.DataFrame,
                               simple_spec: dict[str, Any]) -> None:
    simple_spec["attributes"]["fare"]["tast"] = "normal"
    data, spec = _write(tmp_path, simple_long, simple_spec)
    assert main(["validate", data, "--spec", spec]) == 2
    err = capsys.readouterr().err
    assert "Unknown key 'tast' in [attributes.fare]" in err and "Did you mean 'taste'?" in err
    assert "Traceback" not in err


@pytest.mark.parametrize(
    ("break_it", "needle"),
    [
        (lambda t: t.assign(chosen=0), "'chosen'"),
        (lambda t: t.assign(fare="cheap"), "'fare' is not numeric"),
        (lambda t: pd.concat([t, t.iloc[[0]]]), "Duplicate"),
    ],
)
def test_validate_bad_data(tmp_path: Path, capsys: pytest.CaptureFixture[str], simple_long: pd.DataFrame,
                           simple_spec: dict[str, Any], break_it: Any, needle: str) -> None:
    data, spec = _write(tmp_path, break_it(simple_long), simple_spec)
    assert main(["validate", data, "--spec", spec]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and needle in err


def test_validate_missing_files(tmp_path: Path, capsys: pytest.CaptureFixture[str], simple_long: pd.DataFrame,
                                simple_spec: dict[str, Any]) -> None:
    data, spec = _write(tmp_path, simple_long, simple_spec)
    assert main(["validate", str(tmp_path / "nope.csv"), "--spec", spec]) == 2
    assert "nope.csv" in capsys.readouterr().err
    assert main(["validate", data, "--spec", str(tmp_path / "nope.toml")]) == 2
    assert "nope.toml" in capsys.readouterr().err
    bad = tmp_path / "bad.toml"
    bad.write_text("[columns\n")
    assert main(["validate", data, "--spec", str(bad)]) == 2
    assert "not valid TOML" in capsys.readouterr().err


def test_validate_needs_spec_option(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exc:
        main(["validate", "data.csv"])
    assert exc.value.code == 2
    assert "--spec" in capsys.readouterr().err


def test_python_dash_m_validate(tmp_path: Path, simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    data, spec = _write(tmp_path, simple_long, simple_spec)
    ok = subprocess.run([sys.executable, "-m", "hierchoice", "validate", data, "--spec", spec],
                        capture_output=True, text=True, timeout=120)
    assert ok.returncode == 0, ok.stderr
    assert "valid choice panel" in ok.stdout
    bad_data, _ = _write(tmp_path, simple_long.drop(columns="option"), simple_spec)
    bad = subprocess.run([sys.executable, "-m", "hierchoice", "validate", bad_data, "--spec", spec],
                         capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2
    assert "'option' (alternative)" in bad.stderr and "Traceback" not in bad.stderr
