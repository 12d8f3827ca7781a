"""Shared CLI helpers: turning user errors into one-line messages, console setup."""

from __future__ import annotations

import contextlib
import functools
import json
import sys
import warnings
from typing import Callable, Iterator, Optional, TypeVar

import typer

from denude.cautions import CAUTION
from denude.errors import DenudeError, DenudeWarning, one_line

__all__ = ["CAUTION", "handle_user_errors", "one_line", "progress_callback"]

F = TypeVar("F", bound=Callable)



def handle_user_errors(func: F) -> F:
    """Decorator for command bodies: DenudeError -> one line on stderr, exit code 1.

    The project's own warnings (out-of-range cells, partial coverage) are shown as one-line
    notes on stderr. A body that returns a dict (its `--json` record) has it printed as one
    JSON object on stdout, with those warnings added as ``warnings``; a record holding an
    ``error`` (e.g. failed batch tiles) is printed first, then the error as above (exit 1).
    """

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        notes: list[str] = []
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", DenudeWarning)
            try:
                result = func(*args, **kwargs)
            except DenudeError as exc:
                typer.echo(f"denude: error: {one_line(exc)}", err=True)
                raise typer.Exit(code=1) from None
            finally:
                for item in list(caught):   # a copy: showwarning appends to ``caught`` here
                    if issubclass(item.category, DenudeWarning):
                        notes.append(one_line(item.message))
                        typer.echo(f"denude: warning: {notes[-1]}", err=True)
                    else:
                        warnings.showwarning(
                            item.message, item.category, item.filename, item.lineno
                        )
        if isinstance(result, dict):
            error = result.get("error")
            typer.echo(json.dumps({**result, "warnings": notes}, indent=2, default=str))
            if error:
                typer.echo(f"denude: error: {one_line(error)}", err=True)
                raise typer.Exit(code=1)
            return None
        return result

    return wrapper  # type: ignore[return-value]


@contextlib.contextmanager
def progress_callback(what: str, quiet: bool = False, rate_unit: Optional[str] = None) -> Iterator[Optional[Callable[[int, int], None]]]:
    """A Rich progress bar on stderr (off with ``quiet`` or when stderr is not a terminal).

    Yields a ``progress(done, total)`` callback for the library's long-running functions,
    or None when there is no bar. ``rate_unit`` (e.g. "tiles") adds a per-minute rate and an ETA.
    """
    if quiet or not sys.stderr.isatty():
        yield None
        return
    from rich.console import Console
    from rich.progress import (BarColumn, MofNCompleteColumn, Progress, ProgressColumn,
                               TimeElapsedColumn, TimeRemainingColumn)
    from rich.text import Text

    columns = ["[progress.description]{task.description}", BarColumn(), MofNCompleteColumn()]
    if rate_unit:
        class RateColumn(ProgressColumn):
            def render(self, task):
                speed = task.finished_speed or task.speed
                return Text(f"- {rate_unit}/min" if speed is None else f"{speed * 60:.1f} {rate_unit}/min")

        columns += [RateColumn(), TimeElapsedColumn(), TimeRemainingColumn()]
    else:
        columns += [TimeElapsedColumn(), TimeRemainingColumn()]
    with Progress(*columns, console=Console(stderr=True), transient=True) as bar:
        task = bar.add_task(what, total=None)
        yield lambda done, total: bar.update(task, completed=done, total=total)
