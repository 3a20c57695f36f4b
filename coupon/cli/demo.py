"""``coupon demo``: the whole tool on invented scenes, end to end."""

from __future__ import annotations

from pathlib import Path

import click


@click.command("demo")
@click.argument("out_dir", metavar="DIR", type=click.Path(file_okay=False, path_type=Path))
@click.option("--small", is_flag=True, help="Fewer and smaller scenes (for CI).")
def demo(out_dir: Path, small: bool) -> None:
    """Generate an invented lab's test scenes into DIR/images and run every analysis on them.

    Results go to DIR/results; each generated image has its ground truth beside it
    (*.truth.json), so the recovered numbers can be checked.  The scenario, lab,
    coating systems and images are invented.
    """
    from coupon.demo import run_demo

    ctx = run_demo(out_dir, small=small)
    click.echo(f"demo finished in {ctx.summary['seconds']} s; results in {ctx.results}")
    if ctx.report is not None:
        click.echo(f"report: {ctx.report}")
