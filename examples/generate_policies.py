"""Write the invented Quillmere Mutual policy table (indb.demo_data) to a Parquet file.

Examples
--------
    .venv/bin/python examples/generate_policies.py --rows 1e6
    .venv/bin/python examples/generate_policies.py --rows 10^8 \
        --out benchmarks/data/policies_1e8.parquet

The data are invented; see the docstring of ``indb.demo_data`` for the true effects.
"""

from __future__ import annotations

import os
import time

import click

from indb.demo_data import write_policies


class RowCount(click.ParamType):
    """A row count written as 1000000, 1_000_000, 1e6 or 10^6."""

    name = "rows"

    def __init__(self, minimum: int = 0) -> None:
        self.minimum = minimum

    def convert(
        self, value: object, param: click.Parameter | None, ctx: click.Context | None
    ) -> int:
        if isinstance(value, int):
            return self._checked(value, value, param, ctx)
        text = str(value).strip().replace("_", "")
        try:
            if "^" in text:
                base, exponent = text.split("^", 1)
                number = float(base) ** float(exponent)
            else:
                number = float(text)
        except ValueError:
            self.fail(f"{value!r} is not a row count; write e.g. 1000000, 1e6 or 10^6", param, ctx)
        if number != int(number):
            self.fail(f"{value!r} is not a whole number", param, ctx)
        return self._checked(value, int(number), param, ctx)

    def _checked(
        self, value: object, number: int, param: click.Parameter | None, ctx: click.Context | None
    ) -> int:
        if number < self.minimum:
            self.fail(f"{value!r} is below the minimum {self.minimum}", param, ctx)
        return number


@click.command()
@click.option(
    "--rows",
    type=RowCount(),
    default="1e6",
    show_default=True,
    help="Number of policies, e.g. 1e6 or 10^8 (about 8 bytes per row on disk).",
)
@click.option(
    "--out",
    type=click.Path(dir_okay=False, writable=True),
    default="benchmarks/data/policies.parquet",
    show_default=True,
    help="Parquet file to write (parent folders are created).",
)
@click.option(
    "--seed",
    type=click.IntRange(min=0),
    default=2026,
    show_default=True,
    help="Seed; the same ROWS and seed give the same values.",
)
@click.option(
    "--chunk-rows",
    type=RowCount(minimum=1),
    default="1e6",
    show_default=True,
    help="Rows generated at a time and per Parquet row group; bounds memory use.",
)
def main(rows: int, out: str, seed: int, chunk_rows: int) -> None:
    """Write the invented policy table of ROWS policies to OUT."""
    started = time.perf_counter()
    path = write_policies(out, rows, seed=seed, chunk_rows=chunk_rows)
    seconds = time.perf_counter() - started
    size_mb = os.path.getsize(path) / 1e6
    click.echo(f"wrote {rows:,} policies to {path} ({size_mb:,.1f} MB) in {seconds:.1f} s")


if __name__ == "__main__":
    main()
