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


class step_progress:
    """Progress of a few named steps (training): None/False silent; True a rich bar on stderr;
    a callable is called as ``f(step, done, total)``."""

    def __init__(self, progress: bool | Callable | None, total: int):
        self.progress, self.total, self.done, self.text = progress, total, 0, ""
        self._bar = self._task = None

    def __enter__(self) -> step_progress:
        if self.progress is True:
            from rich.console import Console
            from rich.progress import Progress

            self._bar = Progress(console=Console(stderr=True), transient=True)
            self._bar.start()
            self._task = self._bar.add_task("training", total=self.total)
        return self

    def __exit__(self, *exc) -> None:
        if self._bar is not None:
            self._bar.stop()

    def step(self, text: str) -> None:
        self.text = text
        self._report()

    def advance(self, n: int) -> None:
        self.done = min(self.done + n, self.total)
        self._report()

    def _report(self) -> None:
        if self._bar is not None:
            self._bar.update(self._task, completed=self.done, description=self.text)
        elif callable(self.progress):
            self.progress(self.text, self.done, self.total)
