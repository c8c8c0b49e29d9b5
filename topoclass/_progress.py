"""One progress bar for every long step (rich, on stderr, so stdout stays clean for data)."""

from __future__ import annotations

from collections.abc import Callable


class progress_bar:
    """A rich progress bar on stderr: images done, rate and time left."""

    def __init__(self, total: int, description: str):
        self.total = total
        self.description = description

    def __enter__(self) -> Callable[[], None]:
        from rich.console import Console
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeElapsedColumn,
            TimeRemainingColumn,
        )

        self._progress = Progress(
            TextColumn("{task.description}"),
            BarColumn(),
            MofNCompleteColumn(),
            TextColumn("{task.fields[rate]}"),
            TimeElapsedColumn(),
            TextColumn("eta"),
            TimeRemainingColumn(),
            console=Console(stderr=True),
            transient=False,
        )
        self._progress.start()
        self._task = self._progress.add_task(self.description, total=self.total, rate="")

        def advance() -> None:
            self._progress.advance(self._task)
            task = self._progress.tasks[0]
            if task.speed:
                self._progress.update(self._task, rate=f"{task.speed:.1f} img/s")

        return advance

    def __exit__(self, *exc) -> None:
        self._progress.stop()
