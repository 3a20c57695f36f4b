"""Shared command-line pieces: error handling, option parsers, messages."""

from __future__ import annotations

import sys
import traceback
import warnings
from pathlib import Path

import click

from coupon.errors import CouponError

#: Exit codes: 0 all inputs ok, 1 some inputs failed, 2 usage error (click's own).
EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2


class Failed(click.ClickException):
    """Exit 1 with a one-line message (click prints 'Error: ...')."""

    exit_code = EXIT_FAILED

    def show(self, file=None):
        click.echo(f"error: {self.format_message()}", err=True)


def is_debug() -> bool:
    ctx = click.get_current_context(silent=True)
    while ctx is not None:
        if ctx.obj and isinstance(ctx.obj, dict) and "debug" in ctx.obj:
            return bool(ctx.obj["debug"])
        ctx = ctx.parent
    return False


def fail(exc: BaseException) -> "Failed":
    """Turn an exception into a one-line exit-1 error (with traceback under --debug)."""
    if is_debug():
        traceback.print_exception(exc, file=sys.stderr)
    if isinstance(exc, CouponError):
        return Failed(str(exc))
    return Failed(f"unexpected {type(exc).__name__}: {exc} (rerun with --debug for the traceback)")


def report_failure(message: str, trace: str | None = None) -> None:
    """Print one failed batch item (the batch goes on)."""
    click.echo(f"error: {message}", err=True)
    if trace and is_debug():
        click.echo(trace, err=True)


def _show_warning(message, category, filename, lineno, file=None, line=None):
    click.echo(f"warning: {message}", err=True)


def install_warning_printer(ctx: click.Context) -> None:
    """For the life of the command: warnings become one 'warning: ...' line on stderr.

    Our own warnings (suspicious but usable input, the generic indicator table)
    are always shown; library deprecation notices are not a user's business.
    Filters are restored when the command ends (the process may be a test run).
    """
    ctx.with_resource(warnings.catch_warnings())
    warnings.simplefilter("always")
    warnings.simplefilter("ignore", DeprecationWarning)
    warnings.simplefilter("ignore", PendingDeprecationWarning)
    warnings.showwarning = _show_warning


# -- option parsers ---------------------------------------------------------

def parse_numbers(text: str, count: int | None, what: str, param_hint: str) -> list[float]:
    try:
        vals = [float(v) for v in text.replace(";", ",").split(",") if v.strip()]
    except ValueError:
        raise click.BadParameter(f"{text!r} is not a comma-separated list of numbers ({what})",
                                 param_hint=param_hint) from None
    if count is not None and len(vals) != count:
        raise click.BadParameter(f"expected {count} numbers ({what}), got {len(vals)} in {text!r}",
                                 param_hint=param_hint)
    return vals


def parse_size(text: str, param_hint: str, integer: bool = False) -> tuple[float, float]:
    """Parse 'WxH' (e.g. 9x7 or 75x150)."""
    parts = text.lower().replace("*", "x").split("x")
    try:
        if len(parts) != 2:
            raise ValueError
        a, b = (int(p) if integer else float(p) for p in parts)
    except ValueError:
        kind = "whole numbers" if integer else "numbers"
        raise click.BadParameter(f"{text!r} is not of the form WxH with {kind} (e.g. 9x7)",
                                 param_hint=param_hint) from None
    if a <= 0 or b <= 0:
        raise click.BadParameter(f"{text!r}: both sizes must be positive", param_hint=param_hint)
    return a, b


# -- campaign database --------------------------------------------------------

def db_option(f):
    """``--db PATH``: the campaign database every analysis command also writes to."""
    return click.option(
        "--db", "db_path", type=click.Path(dir_okay=False, path_type=Path),
        help="Campaign database (SQLite) to record the results in [default: coupon.db in --out or its "
             "parent folder if one exists there, else created in --out].")(f)


def record_rows(db, command: str, image, sha256: str | None, settings: dict, profile_sha256: str | None,
                tables: dict, store=None, **keys) -> bool:
    """Record one image's rows in the campaign database; a failure is reported, not raised.

    ``store`` (an open :class:`~coupon.campaign.store.CampaignStore`) saves reopening the
    database for every image of a long series.
    """
    import sqlite3

    from coupon.campaign.store import record_results

    try:
        if store is not None:
            store.replace_results(command, image, sha256, settings, profile_sha256, tables, **keys)
        else:
            record_results(db, command, image, sha256, settings, profile_sha256, tables, **keys)
        return True
    except (CouponError, sqlite3.Error) as exc:
        report_failure(f"{image}: not recorded in the database ({exc})")
        return False


# -- options every batch command shares ---------------------------------------

def workers_option(f):
    return click.option("--workers", default=1, show_default=True, type=click.IntRange(min=1),
                        help="Processes (one per core is the most that helps).")(f)


def force_option(what: str = "images"):
    def deco(f):
        return click.option("--force", is_flag=True, help=f"Redo {what} already processed into --out.")(f)
    return deco


def max_megapixels_option(f):
    from coupon.io.images import DEFAULT_MAX_PIXELS

    return click.option("--max-megapixels", type=click.FloatRange(min=0, min_open=True),
                        default=DEFAULT_MAX_PIXELS / 1e6, show_default=True,
                        help="Refuse larger images (decompression-bomb guard).")(f)
