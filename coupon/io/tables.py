"""Reading tables back: a command's own earlier output, and user CSVs with clear errors."""

from __future__ import annotations

import warnings
from pathlib import Path

import pandas as pd

from coupon.errors import CouponError


class DamagedTableWarning(UserWarning):
    """An earlier output table could not be read back; the images in it are redone."""


def read_previous(path: str | Path, columns: list[str], key: str = "image", **read_kw) -> pd.DataFrame:
    """A command's earlier output table for resume, or an empty one with ``columns``.

    A damaged, empty or foreign file is not an error (the inputs are simply
    processed again and the table rewritten) but it is said in a warning.
    """
    path = Path(path)
    if not path.exists():
        return pd.DataFrame(columns=columns)
    try:
        table = pd.read_csv(path, **read_kw)
        if key not in table.columns:
            raise ValueError(f"no {key!r} column")
        return table
    except (OSError, UnicodeDecodeError, ValueError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        warnings.warn(f"{path}: earlier table cannot be read back ({exc}); its inputs are redone",
                      DamagedTableWarning, stacklevel=2)
        return pd.DataFrame(columns=columns)


def numeric_columns(table: pd.DataFrame, columns: list[str], what: str, path) -> pd.DataFrame:
    """The given columns as floats; a text or empty cell is refused naming its line and column."""
    out = table[columns].apply(pd.to_numeric, errors="coerce")
    bad = out.isna() & table[columns].notna()
    empty = table[columns].isna()
    for mask, kind in ((bad, "is not a number"), (empty, "is empty")):
        if mask.to_numpy().any():
            row, col = next((r, c) for c in columns for r in mask.index[mask[c]])
            value = table.loc[row, col]
            raise CouponError(
                f"{what}: line {int(row) + 2}, column {col} {kind}"
                + (f" ({value!r})" if kind == "is not a number" else ""), path)
    return out.astype(float)


def read_user_csv(path: str | Path, what: str, **read_kw) -> pd.DataFrame:
    """A user's CSV, with one-line errors for unreadable, empty or non-text files."""
    try:
        table = pd.read_csv(path, **read_kw)
    except FileNotFoundError:
        raise CouponError(f"{what} not found", path) from None
    except UnicodeDecodeError:
        raise CouponError(f"{what} is not a text CSV file (save it as UTF-8 CSV)", path) from None
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise CouponError(f"cannot read {what} ({exc})", path) from None
    table.columns = [str(c).strip() for c in table.columns]
    return table
