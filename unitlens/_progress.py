"""A progress bar on stderr with rate and ETA (rich, which typer already brings)."""
from __future__ import annotations

import time


class Progress:
    def __init__(self, total: int, done: int, label: str, unit: str, per: str = "s"):
        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, TextColumn, TimeRemainingColumn
        from rich.progress import Progress as _Rich

        self._p = _Rich(TextColumn(label), BarColumn(), MofNCompleteColumn(), TextColumn("{task.fields[note]}"),
                        TextColumn("{task.fields[rate]}"), TimeRemainingColumn(),
                        console=Console(stderr=True))
        self._p.start()
        self._unit, self._per = unit, per
        self._t0, self._d0 = time.monotonic(), done
        self._task = self._p.add_task(label, total=total, completed=done, rate="", note="")

    def advance(self, done: float, note: str = "") -> None:
        """`done` may be fractional (work within a batch); `note` is shown beside the count."""
        dt = time.monotonic() - self._t0
        rate = (done - self._d0) / dt if dt > 0 else 0.0
        if self._per == "h":
            rate *= 3600
        self._p.update(self._task, completed=done, rate=f"{rate:.1f} {self._unit}/{self._per}", note=note)

    def close(self) -> None:
        self._p.stop()
