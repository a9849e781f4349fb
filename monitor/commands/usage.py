"""Option values checked by the shared argument checks (:mod:`monitor.model.validate`)."""

from __future__ import annotations

import contextlib
from collections.abc import Iterator

import click


@contextlib.contextmanager
def usage_errors() -> Iterator[None]:
    """A bad option value found by a shared check (ValueError) becomes a usage error
    (exit code 2) carrying the check's own sentence, which names the option."""
    try:
        yield
    except ValueError as exc:
        raise click.UsageError(str(exc)) from None
