"""What a notebook or a terminal shows: short reprs, escaped self-contained HTML, progress lines (issue 21).

No fits here: the objects come from a small invented panel (``hierchoice.simulate``), and the holdout result is
assembled from a split of it, so this file costs about a second.
"""

from __future__ import annotations

import io
import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

import hierchoice as hc
from hierchoice._display import Progress, Status, html_table, want_progress
from hierchoice.diagnostics.predictive import HoldoutResult, holdout_split

#: the only tags the displays may contain: anything else came from an unescaped value
_ALLOWED_TAGS = {"div", "p", "strong", "table", "tr", "th", "td"}
_NASTY = '<script>alert("x")</script> & co'


class _Reader(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def _read(page: str) -> _Reader:
    reader = _Reader()
    reader.feed(page)
    reader.close()
    return reader


@pytest.fixture(scope="module")
def panel() -> hc.ChoicePanel:
    sim = hc.ferry_scenario(n_persons=40, seed=3)
    return hc.ChoicePanel.from_frame(sim.data, sim.spec)


def test_html_table_escapes_and_carries_its_own_style() -> None:
    page = html_table(_NASTY, [(_NASTY, _NASTY)], notes=[_NASTY])
    reader = _read(page)
    assert set(reader.tags) <= _ALLOWED_TAGS
    assert reader.text == [_NASTY] * 4  # title, label, value and note survive, as text
    assert "<style" not in page and "<link" not in page and "<script" not in page


def test_spec_repr_is_short_and_its_html_escaped(panel: hc.ChoicePanel) -> None:
    spec = panel.spec
    text = repr(spec)
    # the dataclass dump was 1,198 characters on one line (issue 21)
    assert len(text.splitlines()) <= 12 and len(text) < 800
    for name, attr in spec.attributes.items():
        assert re.search(rf"^  {re.escape(name)}\s+{attr.taste}", text, re.M)
    assert f"{spec.sampling.chains} chains x {spec.sampling.draws} draws" in text
    table = spec.to_dict()
    table["columns"] = dict(table["columns"], person=_NASTY)
    nasty = hc.Spec.from_dict(table)
    reader = _read(nasty._repr_html_())
    assert set(reader.tags) <= _ALLOWED_TAGS and _NASTY in "".join(reader.text)


def test_panel_and_summary_displays(panel: hc.ChoicePanel) -> None:
    assert len(repr(panel).splitlines()) == 1
    reader = _read(panel._repr_html_())
    assert set(reader.tags) <= _ALLOWED_TAGS
    text = " ".join(reader.text)
    assert str(panel.n_persons) in text and f"{panel.chance_rate:.3f}" in text
    summary = panel.summary
    short = repr(summary)
    assert len(short.splitlines()) == 1 and f"{summary.persons} persons" in short and len(short) < 200
    reader = _read(summary._repr_html_())
    assert set(reader.tags) <= _ALLOWED_TAGS
    assert f"{summary.tasks}" in " ".join(reader.text)


def test_holdout_result_displays(panel: hc.ChoicePanel) -> None:
    train, test = holdout_split(panel, tasks=1)
    table = pd.DataFrame({"hit_rate": [0.61, test.chance_rate], "mean_lpd": [-0.83, -np.log(3)],
                          "n_tasks": [test.n_tasks, test.n_tasks]}, index=pd.Index(["mixed", "chance"], name="model"))
    result = HoldoutResult(table=table, tasks=pd.DataFrame(), train=train, test=test)
    text = repr(result)
    assert len(text.splitlines()) == 3 and "hit rate 0.610" in text and f"{test.n_tasks} held-out tasks" in text
    reader = _read(result._repr_html_())
    assert set(reader.tags) <= _ALLOWED_TAGS and "mixed" in reader.text


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_rewrites_one_line_in_a_terminal() -> None:
    out = _Terminal()
    with Progress("scoring", 4, stream=out, unit="draws") as bar:
        for _ in range(4):
            bar.advance()
    text = out.getvalue()
    assert text.startswith("\rscoring: [") and text.endswith("\n") and text.count("\n") == 1
    assert "4/4 draws" in text.splitlines()[-1].split("\r")[-1]


def test_progress_writes_few_whole_lines_elsewhere() -> None:
    out = io.StringIO()
    with Progress("scoring", 50, stream=out) as bar:
        for i in range(50):
            bar.advance()
            if i == 10:
                assert "left" in bar.text()  # the estimate appears once a step is done
    lines = out.getvalue().splitlines()
    assert "\r" not in out.getvalue() and 2 <= len(lines) <= 11
    assert lines[0].endswith("0/50, 0.0 s") and "50/50" in lines[-1]
    silent = io.StringIO()
    with Progress("scoring", 5, enabled=False, stream=silent) as bar:
        bar.advance(5)
    assert silent.getvalue() == ""


def test_status_says_what_runs_and_how_long_it_took() -> None:
    out = _Terminal()
    line = Status("compiling", stream=out).begin()
    line.end()
    line.end()  # a second end (a later draw's callback) adds nothing
    assert re.fullmatch(r"compiling…\rcompiling: done in \d+\.\d s\n", out.getvalue())
    out = io.StringIO()
    line = Status("compiling", stream=out, inline=False).begin()
    line.end(ok=False)
    assert re.fullmatch(r"compiling…\ncompiling: stopped in \d+\.\d s\n", out.getvalue())


def test_progress_is_off_by_default_outside_interactive_use() -> None:
    # pytest captures standard error: not a terminal, not a Jupyter kernel
    assert want_progress(None) is False
    assert want_progress(True) is True and want_progress(False) is False


def test_nutpie_progress_reads_as_text_while_sampling() -> None:
    nutpie_sample = pytest.importorskip("nutpie.sample")
    from hierchoice.inference.nutpie_compile import text_progress

    cls = nutpie_sample._BackgroundSampler
    # nutpie's own template, filled as its renderer fills it (the chain rows left out)
    values = {"num_chains": 2, "running_chains": 2, "finished_chains": 0, "time_sampling": "3s",
              "time_remaining_estimate": "5s", "total_draws": 600, "total_finished_draws": 150}
    page = re.sub(r"{%.*?%}", "", nutpie_sample._progress_template, flags=re.S)
    page = re.sub(r"{{\s*(\w+)\s*}}", lambda m: str(values.get(m.group(1), "")), page)
    widget = cls.__new__(cls)
    widget._html = page
    before = repr(widget)
    assert before.startswith("<nutpie.sample._BackgroundSampler")
    with text_progress():
        text = repr(widget)
    assert text.startswith("nutpie sampling: draws 150/600;") and "Finished Chains: 0" in text
    assert "<" not in text
    assert repr(widget) == before  # nutpie's class is left as it was
