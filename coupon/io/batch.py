"""Batches: many inputs, one failing file never stops the rest; reruns resume.

:func:`run_batch` maps a top-level function over inputs in a process pool
(or in-process for one worker), shows a progress bar on stderr and yields one
:class:`ItemOutcome` per input in input order.  A :class:`CouponError` becomes
the outcome's one-line ``error``; any other exception too, marked unexpected
(with the traceback text kept for ``--debug``).

:class:`ResumeLedger` records, per output folder and command, which input
(by path and SHA-256 of its bytes) was processed with which settings, so a
rerun skips finished inputs unless forced.
"""

from __future__ import annotations

import hashlib
import json
import multiprocessing
import os
import sys
import time
import traceback
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator

import click

from coupon.errors import CouponError
from coupon.io.atomic import to_json_text, write_text


@dataclass
class ItemOutcome:
    item: Any
    result: Any = None
    error: str | None = None
    trace: str | None = None

    @property
    def ok(self) -> bool:
        return self.error is None


def _call(func: Callable, item: Any) -> ItemOutcome:
    try:
        return ItemOutcome(item, func(item))
    except CouponError as exc:
        return ItemOutcome(item, error=str(exc), trace=traceback.format_exc())
    except MemoryError:
        return ItemOutcome(item, error=f"{item}: out of memory (try --workers 1 or a smaller image)")
    except Exception as exc:  # noqa: BLE001 - a batch records every failure and goes on
        return ItemOutcome(
            item, error=f"{item}: unexpected error {type(exc).__name__}: {exc}", trace=traceback.format_exc()
        )


def _pool_context():
    """Worker processes start from a clean server (forkserver) or fresh (spawn), never by forking
    this process: a fork would inherit OpenCV's and BLAS's thread pools mid-use and can deadlock."""
    methods = multiprocessing.get_all_start_methods()
    if "forkserver" not in methods:
        return multiprocessing.get_context("spawn")
    ctx = multiprocessing.get_context("forkserver")
    # the server imports the heavy libraries once; each worker is then a cheap fork of it
    ctx.set_forkserver_preload(["numpy", "cv2", "scipy.ndimage", "pandas", "skimage.measure", "coupon.io.images",
                                "coupon.io.pool_preload"])
    return ctx


def _init_worker() -> None:
    """One OpenCV thread per worker: N workers on N cores, not N thread pools fighting over them."""
    import cv2

    cv2.setNumThreads(1)


def _between_bar_updates(bar, out):
    """Yield ``out`` with the progress bar's line cleared, then draw the bar again.

    On a terminal the bar is one line redrawn in place on stderr; the caller's result lines (stdout)
    would otherwise start at the end of it ("...16% 00:00:10in/tray.jpg R1C1 ...").
    """
    live = bar is not None and getattr(bar, "_is_atty", False) and not getattr(bar, "hidden", False)
    if live:
        bar.file.write("\r\033[K")
        bar.file.flush()
        bar._last_line = None  # click draws only a changed line: draw it again after the caller's lines
    yield out
    if live:
        bar.render_progress()


def run_batch(
    items: Iterable[Any], func: Callable[[Any], Any], *, workers: int = 1, label: str = "Processing",
    progress: bool = True,
) -> Iterator[ItemOutcome]:
    """Apply ``func`` to each item; yield outcomes in input order as they complete."""
    items = list(items)
    show = progress and len(items) > 1
    bar = click.progressbar(length=len(items), label=label, file=sys.stderr) if show else None
    try:
        if bar is not None:
            bar.__enter__()
        if workers <= 1 or len(items) <= 1:
            for it in items:
                out = _call(func, it)
                if bar is not None:
                    bar.update(1)
                yield from _between_bar_updates(bar, out)
        else:
            with ProcessPoolExecutor(max_workers=workers, mp_context=_pool_context(),
                                     initializer=_init_worker) as pool:
                futures = [pool.submit(_call, func, it) for it in items]
                for fut in futures:
                    out = fut.result()
                    if bar is not None:
                        bar.update(1)
                    yield from _between_bar_updates(bar, out)
    finally:
        if bar is not None:
            bar.__exit__(None, None, None)


class Prefetch:
    """Load the next input of an in-process batch on a helper thread while this one is processed.

    ``prefetch(item)`` returns ``load(item)``: taken from the helper thread when it
    was loaded ahead, and it starts loading the item after it in ``items``.
    Decoders release the GIL, so the next frame decodes on the second core while
    the first analyses this one.  A load error is raised for its own item, when
    that item is asked for.  At most one input is held ahead.
    """

    def __init__(self, items: Iterable[Any], load: Callable[[Any], Any]):
        from coupon.io.threads import thread_pool

        self.items = list(items)
        self._next = {a: b for a, b in zip(self.items, self.items[1:])}
        self._load = load
        self._ahead: dict = {}
        self._pool = thread_pool(1, "coupon-prefetch")

    def __call__(self, item: Any) -> Any:
        fut = self._ahead.pop(item, None)
        nxt = self._next.get(item)
        if nxt is not None and nxt not in self._ahead:
            self._ahead[nxt] = self._pool.submit(self._load, nxt)
        return self._load(item) if fut is None else fut.result()

    def close(self) -> None:
        self._pool.shutdown(wait=True, cancel_futures=True)
        self._ahead.clear()

    def __enter__(self) -> "Prefetch":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def settings_hash(settings: dict) -> str:
    """Stable short hash of a settings dict (what would change the numbers)."""
    text = json.dumps(settings, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


class ResumeLedger:
    """Which inputs a command has already processed into an output folder.

    Stored as ``DIR/.coupon/<command>_done.json``: resolved input path -> {image,
    sha256, settings, outputs, status}.  An entry counts as done when the input's
    bytes, the settings and all its recorded output files are unchanged.

    Nothing in it depends on the working directory of the run that wrote it: the
    outputs inside ``DIR`` are stored relative to ``DIR`` (so a rerun from another
    folder, or of a moved output folder, still finds them), and ``image`` keeps the
    path as the run was given it, the way the command's CSV writes it, so
    :meth:`row_key` can tell which input a CSV row belongs to.
    """

    #: seconds between writes of the ledger during a batch (and always at :meth:`flush`)
    FLUSH_EVERY_S = 5.0

    def __init__(self, out_dir: str | os.PathLike, command: str):
        self.root = Path(out_dir).resolve()
        self.path = Path(out_dir) / ".coupon" / f"{command}_done.json"
        self._dirty = False
        self._last_flush = time.monotonic()
        try:
            self.entries: dict[str, dict] = json.loads(self.path.read_text()) if self.path.exists() else {}
        except (json.JSONDecodeError, OSError):
            self.entries = {}
        # the image texts of the entries as loaded: the command's CSV on disk was written with them (a
        # run's own new rows are keyed by their resolved path directly, so records made now do not count)
        found: dict[str, set[str]] = {}
        for k, e in self.entries.items():
            if isinstance(e, dict) and isinstance(e.get("image"), str):
                found.setdefault(e["image"], set()).add(k)
        self._by_image = {t: next(iter(ks)) for t, ks in found.items() if len(ks) == 1}

    @staticmethod
    def key(path: str | os.PathLike) -> str:
        return str(Path(path).resolve())

    def row_key(self, image: str) -> str:
        """The key of the input a CSV row names by ``image`` (the path as its run was given it).

        A row written by a run from another working directory holds a path relative to *that*
        directory: the ledger entry (as loaded) that recorded the same text gives its input.  Text no
        entry (or more than one) recorded is resolved here, as :meth:`key` does.
        """
        return self._by_image.get(str(image)) or self.key(image)

    def _stored(self, output: str | os.PathLike) -> str:
        """An output as the ledger stores it: relative to the output folder when inside it."""
        f = Path(output).resolve()
        return f.relative_to(self.root).as_posix() if self.root in f.parents else str(f)

    def _file(self, stored: str, entry: dict) -> Path:
        """A stored output as a path: relative to the output folder, or (an entry written before the
        ledger recorded ``image``) relative to the working folder, as those versions stored it."""
        return self.root / stored if "image" in entry else Path(stored)  # an absolute one stays itself

    def is_done(self, path: str | os.PathLike, sha256: str, settings: str) -> bool:
        e = self.entries.get(self.key(path))
        return bool(
            e and e.get("sha256") == sha256 and e.get("settings") == settings and e.get("status") == "ok"
            and all(self._file(o, e).exists() for o in e.get("outputs", []))
        )

    def replace_outputs(self, path, outputs: list, out_dir: str | os.PathLike) -> list[Path]:
        """Delete the files an earlier run recorded for ``path`` that the new ``outputs`` no longer include.

        Only files inside ``out_dir`` are touched (the command's own outputs): when a panel's ID changes
        (a layout added, a QR code read), its old overlay and JSON would otherwise stay beside the new
        ones and be counted twice by anyone reading the folder.  Returns the deleted files.
        """
        e = self.entries.get(self.key(path))
        if not e:
            return []
        root = Path(out_dir).resolve()
        keep = {Path(o).resolve() for o in outputs}
        gone = []
        for o in e.get("outputs", []):
            f = self._file(o, e).resolve()
            if f not in keep and f.is_file() and root in f.parents:
                f.unlink()
                gone.append(f)
        return gone

    def record(self, path, sha256: str, settings: str, outputs: list, status: str = "ok") -> None:
        self.entries[self.key(path)] = {
            "image": str(path), "sha256": sha256, "settings": settings,
            "outputs": [self._stored(o) for o in outputs], "status": status,
        }
        self._dirty = True
        # rewriting the whole ledger after every item grows with the batch; every few seconds is
        # enough for a resume after a crash (at worst those seconds' items are redone)
        if time.monotonic() - self._last_flush >= self.FLUSH_EVERY_S:
            self.flush()

    def flush(self) -> None:
        """Write the ledger if anything was recorded since the last write."""
        if self._dirty:
            write_text(self.path, to_json_text(self.entries))
            self._dirty = False
        self._last_flush = time.monotonic()
