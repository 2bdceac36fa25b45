"""The ``ensemble`` command line: a thin layer over :mod:`ensemble.api`.

Exit status: 0 success, 1 failure during a run, 2 invalid scenario or usage, 130
interrupted.
"""

from __future__ import annotations

import typer

app = typer.Typer(add_completion=False, no_args_is_help=True,
                  help="Run sampled ensembles of epidemic compartment models.")


def main() -> None:
    """Console-script entry point."""
    app()
