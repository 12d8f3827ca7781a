"""Shared CLI helpers: turning user errors into one-line messages, console setup."""

from __future__ import annotations

import functools
import warnings
from typing import Callable, TypeVar

import typer

from denude.errors import DenudeError, OutOfRangeWarning

F = TypeVar("F", bound=Callable)

CAUTION = (
    "Caution: screening estimate of potential (maximum) dissolution, not a site "
    "investigation; defer to local codes and licensed geological and geotechnical practice."
)


def one_line(message: object) -> str:
    """Collapse a message to a single line."""
    return " ".join(str(message).split())


def handle_user_errors(func: F) -> F:
    """Decorator for command bodies: DenudeError -> one line on stderr, exit code 1.

    Out-of-range warnings from the numeric core are shown as one-line notes on stderr.
    """

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", OutOfRangeWarning)
            try:
                result = func(*args, **kwargs)
            except DenudeError as exc:
                typer.echo(f"denude: error: {one_line(exc)}", err=True)
                raise typer.Exit(code=1) from None
            finally:
                for item in caught:
                    if issubclass(item.category, OutOfRangeWarning):
                        typer.echo(f"denude: warning: {one_line(item.message)}", err=True)
                    else:
                        warnings.showwarning(
                            item.message, item.category, item.filename, item.lineno
                        )
        return result

    return wrapper  # type: ignore[return-value]
