"""The `watcher` command group: every WatcherError becomes one line on stderr and its exit
code (2 for bad input), never a traceback."""

from __future__ import annotations

import sys

import click

from watcher import __version__
from watcher.errors import WatcherError


class _Group(click.Group):
    """Turns watcher's own errors into a clear message and exit code, never a traceback."""

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except WatcherError as exc:
            click.echo(f"watcher: error: {exc}", err=True)
            sys.exit(exc.exit_code)


@click.group(cls=_Group)
@click.version_option(__version__, prog_name="watcher")
def main() -> None:
    """Ice-crystal coarsening watch for frozen-dessert cold stores."""
