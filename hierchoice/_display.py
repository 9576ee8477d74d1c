"""Displays for notebooks and terminals: short HTML tables for the results' ``_repr_html_``, and progress.

The results objects (spec, panel, validation summary, holdout result) show themselves through
:func:`html_table`, which escapes every value and carries its own inline style, so the HTML is safe to embed
and self-contained. Steps that take more than a few seconds (compiling the model, person-level LOO, holdout
fits) report through :class:`Progress` (a bar with a count, the elapsed time and an estimate of the time
left) or :func:`status` (one line that says what runs and, when it ends, how long it took).

Both write plain text to standard error and rewrite their line in place with a carriage return, which
terminals and Jupyter's output areas both honour; where standard error is neither (a log file, a captured
stream) they write a few whole lines instead. No progress library is needed: the line is all that is drawn.
By default (``progressbar=None``) they show in interactive use only: a terminal, or a Jupyter kernel.
"""

from __future__ import annotations

import html
import sys
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from typing import Any, TextIO

__all__ = ["interactive", "want_progress", "html_table", "Progress", "Status", "status"]

#: the inline style of :func:`html_table`: a compact table that inherits the notebook's fonts and colours
_TABLE_STYLE = "border-collapse:collapse;margin:0.2em 0"
_CELL_STYLE = "text-align:left;padding:0.1em 0.8em 0.1em 0;vertical-align:top"


def _in_notebook() -> bool:
    """Whether this process is a Jupyter kernel (IPython's ``ZMQInteractiveShell``)."""
    ipython = sys.modules.get("IPython")
    if ipython is None:
        return False
    try:
        shell = ipython.get_ipython()
    except Exception:  # an IPython too old or half imported: not a kernel we can tell
        return False
    return type(shell).__name__ == "ZMQInteractiveShell"


def _is_terminal(stream: Any) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):  # no isatty, or a closed stream
        return False


def interactive() -> bool:
    """True in a Jupyter kernel or when standard error is a terminal: where progress is shown by default."""
    return _in_notebook() or _is_terminal(sys.stderr)


def want_progress(progressbar: bool | None) -> bool:
    """``progressbar`` as given, or :func:`interactive` when it is None (the default of the package's functions)."""
    return interactive() if progressbar is None else bool(progressbar)


def html_table(title: str, rows: Sequence[tuple[str, Any]], *, notes: Sequence[str] = ()) -> str:
    """A titled two-column table (label, value) as self-contained HTML, every string escaped."""
    cells = "".join(
        f'<tr><th style="{_CELL_STYLE}">{html.escape(str(label))}</th>'
        f'<td style="{_CELL_STYLE}">{html.escape(str(value))}</td></tr>'
        for label, value in rows
    )
    extra = "".join(f'<p style="margin:0.2em 0">{html.escape(str(n))}</p>' for n in notes)
    return (f'<div class="hierchoice"><p style="margin:0.2em 0"><strong>{html.escape(title)}</strong></p>'
            f'<table style="{_TABLE_STYLE}">{cells}</table>{extra}</div>')


def _seconds(value: float) -> str:
    return f"{value:.1f} s" if value < 60 else f"{int(value // 60)} min {int(value % 60):02d} s"


class Progress:
    """A progress bar over ``total`` steps of one job, on standard error.

    Use it as a context manager and call :meth:`advance` after each step; the line shows the count, the elapsed
    time and, from the first step on, the time left at the rate so far. ``enabled=False`` draws nothing;
    ``inline=False`` prints whole lines (at most eleven) instead of rewriting one.

    >>> with Progress("scoring", 3, enabled=False) as bar:
    ...     for _ in range(3):
    ...         bar.advance()
    >>> bar.done
    3
    """

    width = 24

    def __init__(self, label: str, total: int, *, enabled: bool = True, unit: str = "",
                 stream: TextIO | None = None, inline: bool = True) -> None:
        self.label, self.total, self.enabled, self.unit = label, max(int(total), 0), enabled, unit
        self.stream = stream if stream is not None else sys.stderr
        # a line rewritten in place; whole lines where that cannot work, or (inline=False) where each step
        # prints displays of its own (a sampler's progress)
        self.live = inline and (_in_notebook() or _is_terminal(self.stream))
        self.done = 0
        self.start = time.perf_counter()
        self._drawn = -1.0  # when the line was last drawn
        self._printed = -1  # tenths of the job printed as whole lines (not live)

    def __enter__(self) -> Progress:
        self.start = time.perf_counter()
        self._draw()
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def advance(self, steps: int = 1) -> None:
        """Count ``steps`` more steps done and redraw (at most five times a second)."""
        self.done = min(self.total, self.done + steps)
        now = time.perf_counter()
        if self.done >= self.total or now - self._drawn >= 0.2:
            self._draw()

    def close(self) -> None:
        """End the line (a final redraw with the total time)."""
        if self.enabled and self.live:
            self._draw(end="\n")

    def text(self) -> str:
        """The line as it is drawn now."""
        elapsed = time.perf_counter() - self.start
        filled = self.width * self.done // self.total if self.total else self.width
        bar = "#" * filled + "-" * (self.width - filled)
        line = f"{self.label}: [{bar}] {self.done}/{self.total}{' ' + self.unit if self.unit else ''}, " \
               f"{_seconds(elapsed)}"
        if 0 < self.done < self.total:
            line += f", about {_seconds(elapsed / self.done * (self.total - self.done))} left"
        return line

    def _draw(self, end: str = "") -> None:
        if not self.enabled:
            return
        self._drawn = time.perf_counter()
        if self.live:
            self.stream.write("\r" + self.text() + end)
            self.stream.flush()
            return
        tenth = 10 * self.done // self.total if self.total else 10
        if tenth > self._printed:  # a few whole lines where the line cannot be rewritten
            self._printed = tenth
            self.stream.write(self.text() + "\n")
            self.stream.flush()


class Status:
    """One line that says what runs (``label…``) and, at :meth:`end`, ``label: done in 9.8 s``, on standard error.

    ``inline=False`` writes the two as whole lines, for steps that end while another display (a sampler's
    progress bar) has taken over the terminal. :meth:`end` may be called more than once; the first call counts.
    """

    def __init__(self, label: str, *, enabled: bool = True, stream: TextIO | None = None,
                 inline: bool = True) -> None:
        self.label, self.enabled = label, enabled
        self.stream = stream if stream is not None else sys.stderr
        self.inline = inline and (_in_notebook() or _is_terminal(self.stream))
        self.start = time.perf_counter()
        self.ended = False

    def begin(self) -> Status:
        self.start = time.perf_counter()
        if self.enabled:
            self.stream.write(f"{self.label}…" + ("" if self.inline else "\n"))
            self.stream.flush()
        return self

    def end(self, ok: bool = True, *, what: str = "done") -> None:
        if self.ended:
            return
        self.ended = True
        if self.enabled:
            took = _seconds(time.perf_counter() - self.start)
            self.stream.write(("\r" if self.inline else "") + f"{self.label}: {what if ok else 'stopped'} in {took}\n")
            self.stream.flush()


@contextmanager
def status(label: str, *, enabled: bool = True, stream: TextIO | None = None) -> Iterator[None]:
    """:class:`Status` around a block: ``label…`` while it runs, ``label: done in 9.8 s`` when it ends."""
    line = Status(label, enabled=enabled, stream=stream).begin()
    ok = False
    try:
        yield
        ok = True
    finally:
        line.end(ok)
