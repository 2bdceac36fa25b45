"""How a run reports its progress: a bar on a terminal (rich), a few plain lines
otherwise."""

from __future__ import annotations

import sys


class Progress:
    """Reports a run's progress: a bar on a terminal, a few plain lines otherwise.

    Parameters
    ----------
    bar : draw a progress bar (rich) on standard error; None decides by whether standard
        error is a terminal.
    stream : where plain lines go (default standard error).
    """

    def __init__(self, bar: bool | None = None, stream=None):
        self.stream = stream if stream is not None else sys.stderr
        self.bar = self.stream.isatty() if bar is None else bar
        self._rich = None
        self._task = None

    def note(self, text: str) -> None:
        """One plain line of information."""
        print(f"ensemble: {text}", file=self.stream, flush=True)

    def start(self, to_compute: int, already_done: int, member_count: int) -> None:
        """The run is about to compute ``to_compute`` chunks (``member_count`` members in
        all); ``already_done`` were found finished in the work in progress."""
        if already_done:
            self.note(f"resuming: {already_done} chunks already done, "
                      f"{to_compute} to compute")
        else:
            self.note(f"{to_compute} chunks to compute")
        if self.bar and to_compute:
            from rich.console import Console
            from rich.progress import (BarColumn, MofNCompleteColumn, Progress as Bar,
                                       TextColumn, TimeElapsedColumn, TimeRemainingColumn)

            self._rich = Bar(TextColumn("members"), BarColumn(), MofNCompleteColumn(),
                             TimeElapsedColumn(), TimeRemainingColumn(),
                             console=Console(file=self.stream), transient=True)
            self._rich.start()
            self._task = self._rich.add_task("run", total=member_count)

    def advance(self, member_count: int) -> None:
        """A chunk of ``member_count`` members is saved."""
        if self._rich is not None:
            self._rich.advance(self._task, member_count)

    def close(self) -> None:
        """Remove the bar."""
        if self._rich is not None:
            self._rich.stop()
            self._rich = None
