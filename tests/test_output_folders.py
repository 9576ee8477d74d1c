"""No command deletes or overwrites a file of the user's: output folders are replaced only if hierchoice wrote them.

Each test here failed before folders carried a marker: ``fit --out DIR`` replaced any folder, the user's data
and notes included, and ``--out .`` ran the whole fit before failing with a raw traceback.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import pandas as pd
import pytest

from hierchoice._io import MARKER, atomic_dir, claim_folder, make_folder, write_with
from hierchoice.cli import EXIT_BAD_INPUT, main
from hierchoice.exceptions import ArchiveError
from hierchoice.spec import dumps_toml


def _user_folder(tmp_path: Path, table: pd.DataFrame, spec: dict[str, Any]) -> Path:
    work = tmp_path / "work"
    work.mkdir()
    table.to_csv(work / "data.csv", index=False)
    (work / "spec.toml").write_text(dumps_toml(spec))
    (work / "notes.txt").write_text("my notes\n")
    return work


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in folder.iterdir()}


def test_fit_refuses_a_folder_holding_the_users_files(tmp_path, capsys, simple_long, simple_spec):
    work = _user_folder(tmp_path, simple_long, simple_spec)
    before = _snapshot(work)
    code = main(["fit", str(work / "data.csv"), "--spec", str(work / "spec.toml"), "--out", str(work),
                 "--draws", "5", "--tune", "5", "--chains", "1", "--quiet"])
    err = capsys.readouterr().err
    assert code == EXIT_BAD_INPUT
    assert "lies inside the output folder" in err  # the data file is inside --out
    assert _snapshot(work) == before
    assert [p.name for p in tmp_path.iterdir()] == ["work"]  # no partial folder beside it


def test_fit_refuses_a_foreign_folder_before_any_work(tmp_path, capsys, simple_long, simple_spec):
    work = _user_folder(tmp_path, simple_long, simple_spec)
    other = tmp_path / "elsewhere"
    other.mkdir()
    (other / "budget.xlsx").write_bytes(b"not ours")
    code = main(["fit", str(work / "data.csv"), "--spec", str(work / "spec.toml"), "--out", str(other),
                 "--quiet"])
    captured = capsys.readouterr()
    assert code == EXIT_BAD_INPUT
    assert "was not written by hierchoice" in captured.err and "'budget.xlsx'" in captured.err
    assert "valid choice panel" not in captured.out and "persons" not in captured.out  # refused before loading
    assert (other / "budget.xlsx").read_bytes() == b"not ours"


def test_fit_refuses_the_current_folder(tmp_path, capsys, simple_long, simple_spec, monkeypatch):
    work = _user_folder(tmp_path, simple_long, simple_spec)
    monkeypatch.chdir(work)
    before = _snapshot(work)
    code = main(["fit", "data.csv", "--spec", "spec.toml", "--out", ".", "--quiet"])
    assert code == EXIT_BAD_INPUT
    assert "current folder" in capsys.readouterr().err
    assert _snapshot(work) == before
    assert sorted(os.listdir(tmp_path)) == ["work"]


def test_a_folder_hierchoice_wrote_is_replaced_whole(tmp_path):
    target = tmp_path / "results"
    with atomic_dir(target) as tmp:
        (tmp / "a.txt").write_text("first")
    assert (target / MARKER).exists()
    with atomic_dir(target) as tmp:
        (tmp / "b.txt").write_text("second")
    assert sorted(p.name for p in target.iterdir()) == sorted([MARKER, "b.txt"])
    assert sorted(os.listdir(tmp_path)) == ["results"]


def test_a_file_added_by_the_user_blocks_the_replacement(tmp_path):
    target = tmp_path / "results"
    with atomic_dir(target) as tmp:
        (tmp / "posterior.nc").write_text("x")
    write_with(target / "report.html", lambda p: p.write_text("ours"))  # written later by hierchoice: registered
    claim_folder(target, "results")  # still ours
    (target / "my_notes.md").write_text("theirs")
    with pytest.raises(ArchiveError, match="my_notes.md"):
        with atomic_dir(target) as tmp:
            (tmp / "posterior.nc").write_text("y")
    assert (target / "my_notes.md").read_text() == "theirs" and (target / "posterior.nc").read_text() == "x"
    assert sorted(os.listdir(tmp_path)) == ["results"]


def test_a_failure_leaves_neither_a_partial_folder_nor_damage(tmp_path):
    target = tmp_path / "results"
    with atomic_dir(target) as tmp:
        (tmp / "a.txt").write_text("first")
    with pytest.raises(RuntimeError):
        with atomic_dir(target) as tmp:
            (tmp / "a.txt").write_text("half")
            raise RuntimeError("the fit failed")
    assert (target / "a.txt").read_text() == "first"
    assert sorted(os.listdir(tmp_path)) == ["results"]


def test_kinds_do_not_replace_each_other_and_files_are_refused(tmp_path):
    make_folder(tmp_path / "demo", "demo")
    with pytest.raises(ArchiveError, match="not a results folder"):
        claim_folder(tmp_path / "demo", "results")
    (tmp_path / "file.csv").write_text("x")
    with pytest.raises(ArchiveError, match="not a folder"):
        claim_folder(tmp_path / "file.csv", "results")
    assert claim_folder(tmp_path / "empty-or-new", "results") == tmp_path / "empty-or-new"


def test_demo_refuses_a_folder_of_the_users(tmp_path, capsys):
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "harbourline.csv").write_text("my own file of the same name\n")
    assert main(["demo", "--out", str(mine), "--quick", "--persons", "5"]) == EXIT_BAD_INPUT
    assert "was not written by hierchoice" in capsys.readouterr().err
    assert (mine / "harbourline.csv").read_text() == "my own file of the same name\n"


def test_shares_refuses_to_overwrite_its_market_file(tmp_path, capsys):
    market = tmp_path / "market.csv"
    market.write_text("option,fare\na,1\n")
    code = main(["shares", str(tmp_path / "no-such-results"), "--market", str(market), "--out", str(market)])
    assert code == EXIT_BAD_INPUT
    assert "would be overwritten" in capsys.readouterr().err
    assert market.read_text() == "option,fare\na,1\n"
