"""``coupon`` command group: global options and the list of commands."""

from __future__ import annotations

import importlib
import sys

import click

from coupon import __version__
from coupon.cli.common import install_warning_printer
from coupon.errors import CouponError

#: (module, attribute) of every command; each job's command lives in its own module.
COMMANDS = [
    ("coupon.cli.calibrate", "calibrate"),
    ("coupon.cli.phmap", "phmap"),
    ("coupon.cli.panels", "panels"),
    ("coupon.cli.pits", "pits"),
    ("coupon.cli.droplet", "droplet"),
    ("coupon.cli.demo", "demo"),
    ("coupon.cli.campaign", "campaign"),
    ("coupon.cli.campaign", "export"),
    ("coupon.cli.report", "report"),
]

HELP = """Calibrated, traceable numbers from photos of corrosion tests.

\b
Typical order:
  coupon calibrate target sheet        print a scale and grey target
  coupon calibrate scale ...           pixels to millimetres
  coupon calibrate colour ...          white balance and colour matrix
  coupon calibrate indicator ...       indicator colour to pH from buffer drops
  coupon phmap IMAGES --profile P ...  pH per pixel

Exit codes: 0 all inputs processed, 1 some inputs failed, 2 usage error.
Ratings support, and do not replace, a qualified inspector and the governing
standard or specification.
"""


class _CommandsOnDemand(click.Group):
    """The commands of :data:`COMMANDS`, each imported when it is first asked for.

    ``coupon pits ...`` then imports the pits modules only (about 0.8 s) instead of every job's modules,
    matplotlib included (about 1.6 s); ``coupon --help`` still imports them all for their help lines.
    """

    def list_commands(self, ctx: click.Context) -> list[str]:
        return sorted(set(super().list_commands(ctx)) | {attr for _, attr in COMMANDS})

    def get_command(self, ctx: click.Context, name: str) -> click.Command | None:
        if name not in self.commands:
            for module, attr in COMMANDS:
                if attr == name:
                    self.add_command(getattr(importlib.import_module(module), attr))
        return super().get_command(ctx, name)


@click.group(cls=_CommandsOnDemand, help=HELP,
             context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, "--version", prog_name="coupon")
@click.option("--debug", is_flag=True, help="Show full tracebacks for errors.")
@click.pass_context
def cli(ctx: click.Context, debug: bool) -> None:
    ctx.ensure_object(dict)
    ctx.obj["debug"] = debug
    install_warning_printer(ctx)


def main() -> None:
    """Console entry point: no traceback for any error unless --debug."""
    try:
        cli.main(prog_name="coupon", standalone_mode=True)
    except KeyboardInterrupt:
        click.echo("interrupted", err=True)
        sys.exit(130)
    except CouponError as exc:  # raised outside a command's own handling: still one line
        if "--debug" in sys.argv[1:]:
            raise
        click.echo(f"error: {exc}", err=True)
        sys.exit(1)
    except Exception as exc:  # noqa: BLE001 - the last line of defence against tracebacks
        if "--debug" in sys.argv[1:]:
            raise
        click.echo(f"error: unexpected {type(exc).__name__}: {exc} (rerun with --debug for the traceback)",
                   err=True)
        sys.exit(1)


if __name__ == "__main__":
    main()
