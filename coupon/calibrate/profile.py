"""Calibration profiles: one JSON file per camera and lighting set-up.

Layout (schema version 1)::

    {
      "schema": "coupon-profile",
      "schema_version": 1,
      "created": "2026-12-01T10:00:00+00:00",
      "updated": "...",
      "tool_version": "0.1.0",
      "scale":     {...} | null,     # ScaleCalibration.to_dict(); scale.px_per_mm is the mean scale
      "colour":    {...} | null,     # ColourCorrection.to_dict()
      "indicator": {...} | null,     # IndicatorModel.to_dict()
      "history":   [ {"step", "date", "tool_version", "files": [{"path", "sha256"}], "settings", "residuals"} ]
    }

JSON only: nothing executable is ever read from a profile.  Loading validates
every part and names the profile and the field in its error.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
from dataclasses import dataclass, field, replace
from pathlib import Path

from coupon import __version__
from coupon.calibrate.colour import ColourCorrection
from coupon.calibrate.indicator import IndicatorModel
from coupon.calibrate.scale import ScaleCalibration
from coupon.errors import CouponError, ProfileError
from coupon.io.atomic import to_json_text, write_text

SCHEMA = "coupon-profile"
SCHEMA_VERSION = 1
PARTS = ("scale", "colour", "indicator")


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


@dataclass(frozen=True)
class Profile:
    """A loaded calibration profile (any part may be missing)."""

    scale: ScaleCalibration | None = None
    colour: ColourCorrection | None = None
    indicator: IndicatorModel | None = None
    history: tuple[dict, ...] = ()
    created: str = field(default_factory=_now)
    path: Path | None = None
    #: SHA-256 of the file's bytes as read by :func:`load_profile` (None for a profile not read from a file)
    sha256: str | None = None

    def to_dict(self) -> dict:
        return {
            "schema": SCHEMA,
            "schema_version": SCHEMA_VERSION,
            "created": self.created,
            "updated": _now(),
            "tool_version": __version__,
            "scale": None if self.scale is None else self.scale.to_dict(),
            "colour": None if self.colour is None else self.colour.to_dict(),
            "indicator": None if self.indicator is None else self.indicator.to_dict(),
            "history": list(self.history),
        }

    def with_part(self, part: str, value, step_record: dict) -> "Profile":
        """A copy with one part replaced and the step appended to the history."""
        if part not in PARTS:
            raise ValueError(part)
        # the copy is no longer the file that was read: it has no file hash until saved and reloaded
        return replace(self, **{part: value}, history=(*self.history, step_record), sha256=None)


def step_record(step: str, files: list[tuple[str, str]], settings: dict, residuals: dict | None = None) -> dict:
    """One history entry: what was done, from which files (path, SHA-256), with which settings."""
    return {
        "step": step,
        "date": _now(),
        "tool_version": __version__,
        "files": [{"path": str(p), "sha256": h} for p, h in files],
        "settings": settings,
        "residuals": residuals or {},
    }


def load_profile(path: str | Path) -> Profile:
    """Read and validate a profile.

    Raises
    ------
    ProfileError
        Missing file, not JSON, wrong schema or version, or an invalid part.
    """
    path = Path(path)
    if not path.is_file():
        raise ProfileError("profile not found; create it with 'coupon calibrate scale|colour|indicator'", path)
    try:
        file_bytes = path.read_bytes()  # read once: the hash in every result is of exactly these bytes
    except OSError as exc:
        raise ProfileError(f"profile cannot be read ({exc.strerror or exc})", path) from None
    try:
        data = json.loads(file_bytes.decode("utf-8"))
    except UnicodeDecodeError:
        raise ProfileError("profile is not a text file (expected JSON)", path) from None
    except json.JSONDecodeError as exc:
        raise ProfileError(f"profile is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})", path) from None
    if not isinstance(data, dict):
        raise ProfileError("profile must be a JSON object", path)
    if data.get("schema") != SCHEMA:
        raise ProfileError(f"not a coupon profile (schema is {data.get('schema')!r}, expected {SCHEMA!r})", path)
    version = data.get("schema_version")
    if version != SCHEMA_VERSION:
        raise ProfileError(
            f"profile schema version {version!r} is not supported by coupon {__version__} (reads version {SCHEMA_VERSION})",
            path,
        )
    parts = {}
    for part, cls in (("scale", ScaleCalibration), ("colour", ColourCorrection), ("indicator", IndicatorModel)):
        raw = data.get(part)
        if raw is None:
            parts[part] = None
            continue
        if not isinstance(raw, dict):
            raise ProfileError(f"'{part}' must be an object or null", path)
        try:
            parts[part] = cls.from_dict(raw)
        except CouponError as exc:
            raise ProfileError(f"invalid '{part}': {exc.message}", path) from None
        except (KeyError, TypeError, ValueError) as exc:
            raise ProfileError(f"invalid '{part}': missing or malformed field ({exc})", path) from None
    history = data.get("history", [])
    if not isinstance(history, list):
        raise ProfileError("'history' must be a list", path)
    return Profile(**parts, history=tuple(history), created=str(data.get("created", _now())), path=path,
                   sha256=hashlib.sha256(file_bytes).hexdigest())


def load_or_new(path: str | Path) -> Profile:
    """Load an existing profile to update it, or start a new one."""
    path = Path(path)
    return load_profile(path) if path.exists() else Profile(path=path)


def save_profile(profile: Profile, path: str | Path) -> Path:
    """Write a profile atomically."""
    path = Path(path)
    write_text(path, to_json_text(profile.to_dict()))
    return path
