"""Terminal progress: frames done, frames per second, time left (rich)."""

from __future__ import annotations

import sys
import time

STAGE_LABELS = {"analyse": "reading motion", "render": "writing frames"}


class TerminalProgress:
    """A `Progress` callback drawing one bar per stage; silent when ``quiet``."""

    def __init__(self, quiet: bool = False):
        # a bar only makes sense on a terminal; logs and pipes get the summary lines
        self.quiet = quiet or not sys.stderr.isatty()
        self._progress = None
        self._tasks = {}
        self._started = {}

    def __enter__(self):
        if not self.quiet:
            from rich.console import Console
            from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

            self._progress = Progress(
                TextColumn("{task.description:>15}"),
                BarColumn(bar_width=32),
                MofNCompleteColumn(),
                TextColumn("{task.fields[unit]}"),
                TextColumn("{task.fields[fps]:>6.1f}/s"),
                TimeRemainingColumn(),
                console=Console(stderr=True),
                transient=False,
            )
            self._progress.start()
        return self

    def __exit__(self, *exc):
        if self._progress is not None:
            self._progress.stop()

    def __call__(self, stage: str, done: int, total):
        if self._progress is None:
            return
        if stage not in self._tasks:
            unit = "fits" if "search" in stage else "frames"  # the motion method's readout search counts fits
            self._tasks[stage] = self._progress.add_task(STAGE_LABELS.get(stage, stage), total=total, fps=0.0,
                                                         unit=unit)
            self._started[stage] = time.perf_counter()
        elapsed = max(time.perf_counter() - self._started[stage], 1e-6)
        self._progress.update(self._tasks[stage], completed=done, total=total, fps=done / elapsed)
