"""Progress bars of the commands: one transient rich bar on stderr, drawn only on a terminal."""

from __future__ import annotations

__all__ = ["ProgressBar"]


class ProgressBar:
    """A transient rich progress bar on stderr; the context yields ``progress(done, total, what=None)``.

    Drawn only when stderr is a terminal, so piped or logged output carries no blank lines
    or control codes (used by `project`, `change` and `info`).
    """

    def __init__(self, description: str):
        self.description = description
        self.bar = None

    def __enter__(self):
        from rich.console import Console
        from rich.progress import BarColumn, Progress, TaskProgressColumn, TextColumn, TimeElapsedColumn

        console = Console(stderr=True)
        if not console.is_terminal:
            return self.update
        self.bar = Progress(TextColumn("{task.description}"), BarColumn(), TaskProgressColumn(), TimeElapsedColumn(),
                            console=console, transient=True)
        self.bar.__enter__()
        self.task = self.bar.add_task(self.description, total=None)
        return self.update

    def update(self, done, total, what=None):
        if self.bar is not None:
            self.bar.update(self.task, completed=done, total=total, **({"description": what} if what else {}))

    def __exit__(self, *exc):
        return None if self.bar is None else self.bar.__exit__(*exc)
