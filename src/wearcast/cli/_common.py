"""Pieces every command shares: error mapping and option groups."""

from __future__ import annotations

import functools
import sys

import click

from wearcast import CAUTION
from wearcast.exceptions import WearcastError

EPILOG_CAUTION = f"Caution: {CAUTION}"


def library_call(func):
    """Run a command body; map :class:`WearcastError` to message + exit code."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        try:
            return func(*args, **kwargs)
        except WearcastError as exc:
            click.echo(f"error: {exc}", err=True)
            quarantine = getattr(exc, "quarantine_path", None)
            if quarantine:
                click.echo(f"rejected rows and reasons: {quarantine}", err=True)
            sys.exit(exc.exit_code)

    return wrapper


def command_help(summary: str, example: str) -> str:
    """Help text with an example and the safety caution (click keeps \\b blocks)."""
    return f"{summary}\n\n\b\nExample:\n  {example}\n\n{EPILOG_CAUTION}"
