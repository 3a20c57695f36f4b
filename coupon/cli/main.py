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

#: Each command's help line (the first sentence of its help), so ``coupon --help`` lists the commands
#: without importing them (1.8 s -> 0.2 s); a test keeps these equal to the commands' own.
SUMMARIES = {
    "calibrate": "Make or update a calibration profile (scale, colour, indicator), print a target.",
    "campaign": "Set up a test campaign and see what has been rated.",
    "demo": "Generate an invented lab's test scenes into DIR/images and run every analysis on them.",
    "droplet": "Droplet time-lapse: per frame the drop outline, its pH map, acidic / neutral / basic zones, rust "
               "and a radial pH profile; over the series the events (first acidic zone, first rust, peak "
               "acidity, evaporation rate) and pictures.",
    "export": "Write every table of the campaign database, one file per table, plus the derived tables (ratings "
              "over time, per system, time to failure, ranking, growth, coupons).",
    "panels": "Rate coated test panels in tray photos: rust area and grade (ASTM D610, ISO 4628-3), creepage from "
              "a scribe (ASTM D1654), one overlay and one JSON per panel, DIR/panels.csv.",
    "phmap": "pH per pixel for each image: DIR/<stem>_ph.tiff (float32, NaN off the indicator path), "
             "DIR/<stem>_ph.png (picture with colour bar) and DIR/phmap.csv; prints the median pH.",
    "pits": "Pits on cleaned coupons: count, density, size, depth, spread, ASTM G46 ratings and, with the mass "
            "loss, the ASTM G1 corrosion rate and the pitting factor.",
    "report": "Write the campaign report: summary, criteria, tables per system, ratings against exposure time "
              "with the replicate spread, time to failure, overlays per specimen, droplet zones and kymographs, "
              "pits, calibration, cautions.",
}

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
    matplotlib included (about 1.6 s); ``coupon --help`` lists them from :data:`SUMMARIES`.
    """

    def format_commands(self, ctx: click.Context, formatter: click.HelpFormatter) -> None:
        names = self.list_commands(ctx)
        limit = formatter.width - 6 - max(len(n) for n in names)
        rows = []
        for name in names:
            if name not in self.commands and name in SUMMARIES:  # not imported: its line from SUMMARIES
                rows.append((name, click.Command(name, help=SUMMARIES[name]).get_short_help_str(limit)))
                continue
            cmd = self.get_command(ctx, name)
            if cmd is not None and not cmd.hidden:
                rows.append((name, cmd.get_short_help_str(limit)))
        with formatter.section("Commands"):
            formatter.write_dl(rows)

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
