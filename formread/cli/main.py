"""The ``formread`` command: joins the command groups into one app."""

from __future__ import annotations

import typer

from . import demo, layout, read, retrain, review, train

app = typer.Typer(
    name="formread",
    help="Read handwritten numbers on scanned paper forms, on an ordinary CPU.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)

for _group in (train, layout, read, demo, review, retrain):
    _group.register(app)


def main() -> None:
    """Console-script entry point."""
    app()
