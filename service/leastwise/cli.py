"""The ``leastwise`` command line."""

from __future__ import annotations

import click

from leastwise import __version__


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="leastwise")
def main() -> None:
    """Exact streaming least-squares models per machine."""


@main.command()
@click.option("--readings", default=2000, show_default=True, help="Simulated readings to stream.")
@click.option("--seed", default=7, show_default=True, help="Random seed of the simulation.")
def demo(readings: int, seed: int) -> None:
    """Stream simulated chiller readings through the engine and print the fitted baseline."""
    from leastwise.demo_engine import run

    run(readings=readings, seed=seed, echo=click.echo)
