"""Messages a new user meets: rows named as the user sees them, data a model cannot learn from, files of the
wrong kind, and command-line options refused before any work is done."""

from __future__ import annotations

import copy
import gzip
import subprocess
import sys
import textwrap
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

import hierchoice as hc
from hierchoice import ChoicePanel, DataError, load_panel, read_table
from hierchoice.cli import EXIT_BAD_INPUT, main
from hierchoice.demo import run_demo
from hierchoice.spec import dumps_toml

WIDE_SPEC: dict[str, Any] = {
    "columns": {"person": "id", "task": "q", "alternative": "alt", "chosen": "chosen"},
    "attributes": {"price": {}, "time": {"taste": "normal"}},
    "wide": {"alternatives": ["1", "2"], "choice": "pick", "pattern": "{attribute}{alternative}"},
}


def _csv(tmp_path: Path, table: pd.DataFrame, name: str = "choices.csv") -> Path:
    path = tmp_path / name
    table.to_csv(path, index=False)
    return path


def _error(source: Any, spec: Any) -> str:
    with pytest.raises(DataError) as err:
        load_panel(source, spec)
    return str(err.value)


# --------------------------------------------------------------------------- rows as the user sees them


def test_a_file_names_its_line_header_counted(tmp_path: Path, simple_long: pd.DataFrame,
                                              simple_spec: dict[str, Any]) -> None:
    table = simple_long.astype({"fare": object})
    table.loc[4, "fare"] = "cheap"  # the fifth data row: line 6 of the file, the header being line 1
    path = _csv(tmp_path, table)
    assert path.read_text().splitlines()[5].split(",")[4] == "cheap"
    msg = _error(path, simple_spec)
    assert "'cheap' at file line 6." in msg and "row 4" not in msg


def test_blank_lines_and_quoted_line_breaks_keep_the_line_numbers(tmp_path: Path, simple_long: pd.DataFrame,
                                                                  simple_spec: dict[str, Any]) -> None:
    table = simple_long.assign(note="")
    table.loc[1, "note"] = "two\nlines"  # row 1 spans lines 3-4 of the file
    table = table.astype({"fare": object})
    table.loc[4, "fare"] = "cheap"
    lines = table.to_csv(index=False).splitlines()
    # a blank line after the header and one after row 2 (pandas skips both)
    text = "\n".join([lines[0], ""] + lines[1:5] + ["   "] + lines[5:]) + "\n"
    path = tmp_path / "gappy.csv"
    path.write_text(text)
    # the line of the file that holds 'cheap', counted by hand from the text itself
    line = next(i for i, s in enumerate(text.splitlines(), start=1) if ",cheap," in s)
    assert line == 9
    assert f"'cheap' at file line {line}." in _error(path, simple_spec)
    gz = tmp_path / "gappy.csv.gz"
    gz.write_bytes(gzip.compress(text.encode()))
    assert f"'cheap' at file line {line}." in _error(gz, simple_spec)
    frame = read_table(path)
    assert frame.index.name == "file line" and frame.index[4] == line


def test_a_frame_names_its_own_index_labels(simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    table = simple_long.set_axis([f"obs{i}" for i in range(100, 112)]).astype({"fare": object})
    table.loc["obs104", "fare"] = "cheap"
    table.loc["obs107", "fare"] = "dear"
    msg = _error(table, simple_spec)
    assert "at rows 'obs104', 'obs107'." in msg
    # a shuffled frame names the same labels, not positions
    shuffled = table.sample(frac=1.0, random_state=3)
    assert "at rows 'obs104', 'obs107'." in _error(shuffled, simple_spec) or \
        "at rows 'obs107', 'obs104'." in _error(shuffled, simple_spec)


def test_duplicates_and_id_types_name_file_lines(tmp_path: Path, simple_long: pd.DataFrame,
                                                 simple_spec: dict[str, Any]) -> None:
    doubled = pd.concat([simple_long, simple_long.iloc[[0]]], ignore_index=True)  # data row 13: line 14
    msg = _error(_csv(tmp_path, doubled), simple_spec)
    assert "at file lines 2, 14." in msg
    mixed = simple_long.astype({"respondent": object})
    mixed.loc[7, "respondent"] = "p2"  # line 9
    mixed.loc[8:, "respondent"] = "p2"
    frame = mixed.set_axis(range(50, 62))
    assert "row 57 ('p2': str)" in _error(frame, simple_spec)


def test_a_wide_file_names_the_wide_line(tmp_path: Path) -> None:
    wide = pd.DataFrame({"id": [1, 1, 2], "q": [1, 2, 1], "pick": [1, 2, 1], "price1": [1.0, 2.0, 3.0],
                         "price2": [2.0, "free", 1.0], "time1": [3, 4, 5], "time2": [5, 4, 2]})
    path = _csv(tmp_path, wide)
    # found on the second wide row, line 3 of the file, though it is the fourth long row
    assert "values 'free' at file line 3." in _error(path, WIDE_SPEC)
    bad_pick = _csv(tmp_path, wide.assign(price2=[2.0, 3.0, 1.0], pick=[1, 2, 5]), "pick.csv")
    assert "values '5' at file line 4 " in _error(bad_pick, WIDE_SPEC)
    # wide_to_long's own result keeps a plain 0..n-1 index
    long = hc.wide_to_long(read_table(bad_pick).assign(pick=[1, 2, 1]), WIDE_SPEC)
    assert list(long.index) == list(range(6))


# --------------------------------------------------------------------------- data a model cannot learn from


def test_tasks_without_a_choice_are_counted(simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    table = simple_long.assign(offered=1)
    simple_spec["columns"]["available"] = "offered"
    # respondent 2, task 1 chose c: offer nothing else there (one available alternative)
    forced = (table["respondent"] == 2) & (table["task"] == 1) & (table["chosen"] == 0)
    table.loc[forced, "offered"] = 0
    panel = ChoicePanel.from_frame(table, simple_spec)
    assert panel.n_tasks == 4  # kept ...
    assert int((panel.available.sum(axis=2)[panel.task_mask] == 1).sum()) == 1
    notes = [n for n in panel.summary.notes if "only one available alternative" in n]  # ... and counted
    assert notes and notes[0].startswith("1 task of 1 person offer")
    assert "only one available alternative" in str(panel.summary)


def test_a_panel_without_any_choice_is_refused(tmp_path: Path, simple_long: pd.DataFrame,
                                               simple_spec: dict[str, Any]) -> None:
    only_chosen = simple_long[simple_long["chosen"] == 1]  # every task has one alternative, always chosen
    msg = _error(only_chosen, simple_spec)
    assert "No task offers a choice" in msg and "'option'" in msg
    path = _csv(tmp_path, only_chosen)
    spec = tmp_path / "spec.toml"
    spec.write_text(dumps_toml(simple_spec))
    assert main(["validate", str(path), "--spec", str(spec)]) == EXIT_BAD_INPUT
    wide = pd.DataFrame({"id": [1, 2], "q": [1, 1], "pick": [1, 2], "price1": [1.0, 2.0], "price2": [2.0, 1.0],
                         "time1": [3, 4], "time2": [5, 4], "av1": [1, 0], "av2": [0, 1]})
    spec_wide = copy.deepcopy(WIDE_SPEC)
    spec_wide["columns"]["available"] = "avail"
    spec_wide["wide"]["available_pattern"] = "av{alternative}"
    msg = _error(wide, spec_wide)
    assert "No task offers a choice" in msg and "[wide]" not in msg


@pytest.mark.parametrize("value", [1e308, -2e15, np.inf])
def test_attribute_values_that_would_overflow_a_utility(tmp_path: Path, simple_long: pd.DataFrame,
                                                        simple_spec: dict[str, Any], value: float) -> None:
    table = simple_long.copy()
    table.loc[6, "minutes"] = value  # line 8 of the file
    msg = _error(_csv(tmp_path, table), simple_spec)
    assert "'minutes'" in msg and "file line 8" in msg


def test_attribute_far_from_zero_after_scaling(simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    # every value within 1e15, but the spread is tiny: divided by its standard deviation (0.1), 5e14 becomes 5e15
    table = simple_long.assign(minutes=5e14 + 0.2 * (simple_long.index % 2))
    msg = _error(table, simple_spec)
    assert "'minutes'" in msg and "standard deviations" in msg and "Subtract a constant" in msg
    # the same spread near 0 is fine
    assert ChoicePanel.from_frame(simple_long.assign(minutes=0.2 * (simple_long.index % 2)), simple_spec)


@pytest.mark.parametrize("value", [np.inf, 1e300])
def test_covariate_values_must_be_finite_and_moderate(simple_long: pd.DataFrame, simple_spec: dict[str, Any],
                                                      value: float) -> None:
    table = simple_long.assign(age=np.where(simple_long["respondent"] == 1, 30.0, value))
    simple_spec["covariates"] = {"columns": ["age"]}
    msg = _error(table, simple_spec)
    assert "Covariate column 'age'" in msg and "rows 6, 7, 8" in msg


def _correlated(spec: dict[str, Any]) -> dict[str, Any]:
    out = copy.deepcopy(spec)
    out["model"] = {"correlated": True}
    return out


def test_correlated_tastes_need_more_persons_than_random_tastes(simple_long: pd.DataFrame,
                                                                simple_spec: dict[str, Any]) -> None:
    # 2 random tastes (fare lognormal, minutes normal): a correlation needs at least 3 persons
    with pytest.raises(DataError, match=r"2 random tastes .* 2 persons: at least 3"):
        ChoicePanel.from_frame(simple_long, _correlated(simple_spec))
    third = simple_long[simple_long["respondent"] == 1].assign(respondent=3)
    assert ChoicePanel.from_frame(pd.concat([simple_long, third]), _correlated(simple_spec)).n_persons == 3
    # the same refusal when a validated panel is given a correlated spec
    panel = ChoicePanel.from_frame(simple_long, simple_spec)
    with pytest.raises(DataError, match="model.correlated = true"):
        panel.with_spec(_correlated(simple_spec))


def test_a_single_person_with_random_tastes_is_warned(simple_long: pd.DataFrame,
                                                      simple_spec: dict[str, Any]) -> None:
    one = simple_long[simple_long["respondent"] == 1]
    with pytest.raises(DataError, match="1 person: at least 3"):
        ChoicePanel.from_frame(one, _correlated(simple_spec))
    panel = ChoicePanel.from_frame(one, simple_spec)
    assert any(n.startswith("only 1 person") and "'fare', 'minutes'" in n for n in panel.summary.notes)
    fixed = copy.deepcopy(simple_spec)
    fixed["attributes"] = {"fare": {}, "minutes": {}}
    assert not ChoicePanel.from_frame(one, fixed).summary.notes


# --------------------------------------------------------------------------- files of the wrong kind


def test_json_is_named_with_the_file_types_read(tmp_path: Path, simple_long: pd.DataFrame) -> None:
    text = simple_long.to_json(orient="records")
    for name in ("choices.csv", "choices.json"):
        (tmp_path / name).write_text(text)
        with pytest.raises(DataError) as err:
            read_table(tmp_path / name)
        msg = str(err.value)
        assert "JSON" in msg and "CSV (.csv" in msg and "Parquet" in msg and "empty" not in msg


@pytest.mark.parametrize(("sep", "word"), [(";", "semicolon"), ("\t", "tab")])
def test_one_column_with_separators_in_its_name(tmp_path: Path, simple_long: pd.DataFrame, sep: str,
                                                word: str) -> None:
    path = tmp_path / "choices.csv"
    simple_long.to_csv(path, sep=sep, index=False)
    with pytest.raises(DataError, match=f"looks like a {word}-separated file"):
        read_table(path)


def test_encodings_are_named(tmp_path: Path, simple_long: pd.DataFrame) -> None:
    path = tmp_path / "choices.csv"
    simple_long.to_csv(path, index=False, encoding="utf-16")
    with pytest.raises(DataError, match=r'UTF-16 .* encoding="utf-16"') as err:
        read_table(path)
    assert "codec" not in str(err.value)
    simple_long.assign(option=["café", "b", "c"] * 4).to_csv(path, index=False, encoding="latin-1")
    with pytest.raises(DataError, match=r'not UTF-8 text .* encoding="latin-1"'):
        read_table(path)


def test_a_header_without_rows(tmp_path: Path) -> None:
    path = tmp_path / "choices.csv"
    path.write_text("respondent,task,option,chosen,fare\n")
    with pytest.raises(DataError, match="has a header line but no data rows"):
        read_table(path)


# --------------------------------------------------------------------------- the command line


def test_demo_refuses_no_persons_before_writing(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "demo"
    with pytest.raises(SystemExit) as stop:
        main(["demo", "--persons", "0", "--out", str(out)])
    assert stop.value.code == EXIT_BAD_INPUT
    assert "--persons: must be a whole number >= 1, got '0'" in capsys.readouterr().err
    assert not out.exists()
    with pytest.raises(hc.HierchoiceError, match="persons .* whole number >= 1, got 0"):
        run_demo(out, persons=0)
    assert not out.exists()


@pytest.mark.parametrize(("option", "value"), [("--draws", "0"), ("--chains", "-1"), ("--tune", "x")])
def test_fit_refuses_bad_sampling_options_before_the_data(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                          option: str, value: str) -> None:
    out = tmp_path / "results"
    with pytest.raises(SystemExit) as stop:  # the data and spec files do not even exist: nothing was read
        main(["fit", str(tmp_path / "none.csv"), "--spec", str(tmp_path / "none.toml"), "--out", str(out),
              option, value])
    assert stop.value.code == EXIT_BAD_INPUT
    err = capsys.readouterr().err
    assert f"argument {option}: must be a whole number" in err and "none.csv" not in err
    assert not out.exists()


@pytest.mark.parametrize("command", ["report", "shares"])
def test_a_missing_results_folder_is_named(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                           command: str) -> None:
    market = tmp_path / "market.csv"
    market.write_text("option,fare\na,1\nb,2\n")
    extra = ["--market", str(market)] if command == "shares" else []
    assert main([command, str(tmp_path / "no-such"), *extra]) == EXIT_BAD_INPUT
    err = capsys.readouterr().err
    assert "results folder" in err and "does not exist" in err and "posterior.nc" not in err
    assert main([command, str(market), *extra]) == EXIT_BAD_INPUT
    assert "is a file, not a results folder" in capsys.readouterr().err


def test_shares_prints_each_warning_once(tmp_path: Path) -> None:
    # run in a fresh interpreter, where nothing has configured warnings or logging (as for a user), so that a
    # record the library warns about would reach the terminal through the default warning filter
    market = tmp_path / "market.csv"
    market.write_text("option,fare\na,1\nb,2\n")
    (tmp_path / "results").mkdir()
    script = textwrap.dedent(f"""
        import pandas as pd
        import hierchoice.analysis.shares as shares
        import hierchoice.inference.results as results
        from hierchoice._records import warn_records, warning_record
        from hierchoice.cli import main

        def fake_shares(result, market, persons, prob):
            records = [warning_record("extrapolation", "warning", "fare 9 lies outside the design")]
            warn_records(records)  # what the library does (a HierchoiceWarning)
            table = pd.DataFrame({{"alternative": ["a", "b"], "median": [0.4, 0.6]}})
            table.attrs["warnings"] = records
            return table

        shares.predict_shares = fake_shares
        results.load_fit = lambda folder: None
        raise SystemExit(main(["shares", {str(tmp_path / "results")!r}, "--market", {str(market)!r}]))
    """)
    run = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    assert run.stderr.count("fare 9 lies outside the design") == 1
    assert "warning: fare 9 lies outside the design" in run.stderr
