"""The report's figures drawn by two processes: charts and close-ups beside the maps.

The second process draws the charts, then close-ups; the first reads the map rasters, draws the
overview and builds the interactive map, then draws close-ups too.  The two take close-ups from
one shared counter, so whichever is free draws the next one.  (Drawing the overview in the second
process as well was measured slower and larger: it needs every parcel's shape, which the first
process would hand over or the second copy.)

Drawing is Python holding the GIL, so threads cannot share it out; a process can.  The worker
is made with ``fork`` (the standard library's ``multiprocessing``, *fork* context), so it starts
at once with every module the parent has loaded (it loads matplotlib itself while the parent writes
the tables) and shares the parent's memory page by page until either writes (its own figures and the
pages the parent changes later are all it adds).

When to fork matters: a fork copies only the calling thread, so a lock held at that moment
by another thread (GDAL's, for one) stays locked for ever in the child.  :func:`start` is
therefore called where no other thread works: the audit calls it right after the window pass,
before the COG copies start on their thread, and hands the job over later with :meth:`submit`
(the tables it needs are written by then); ``landcheck report`` calls it before anything else.
Where ``fork`` does not exist (or with one core) :func:`start` returns ``None`` and the report
draws everything itself, with the same bytes.

The child ignores Ctrl-C (the parent decides how to stop, see ``landcheck.engine.interrupt``),
dies with its parent (``PR_SET_PDEATHSIG`` on Linux) and writes only through the figure
functions' atomic writers, into the folder the parent stages and removes on failure.
"""

from __future__ import annotations

import contextlib
import gc
import logging
import os
import sys
import traceback
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

from landcheck.engine.interrupt import die_with_parent
from landcheck.errors import OutputWriteError

__all__ = [
    "FigureJob",
    "FigureWorker",
    "start",
    "closeup_subset",
    "closeup_folder",
    "draw_overview",
    "draw_closeups",
    "draw_charts",
    "warm_up",
]

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class FigureJob:
    """What the worker draws: the arguments :func:`landcheck.evidence.report.build_report` gives them."""

    out_dir: Path
    figures_dir: Path
    slope_breaks_pct: tuple[float, ...]
    max_closeups: int
    dpi: int
    figure_formats: tuple[str, ...]
    closeup_formats: tuple[str, ...]
    raster_files: dict[str, Path] | None
    #: the rows of parcels.csv / parcels.gpkg the close-ups need (:func:`closeup_subset`)
    parcel_rows: object = None
    parcel_shapes: object = None


@dataclass
class DrawnFigures:
    """The worker's answer: the items of the close-ups it drew and of the three charts."""

    closeups: list
    charts: list[list]


def _can_fork() -> bool:
    """Linux (where ``fork`` and ``PR_SET_PDEATHSIG`` exist) with two or more cores for this process."""
    return sys.platform.startswith("linux") and len(os.sched_getaffinity(0)) >= 2


def start() -> FigureWorker | None:
    """Fork the worker now (see the module text for when that is safe); ``None`` where it cannot run."""
    if os.environ.get("LANDCHECK_REPORT_PROCESSES", "") == "1" or not _can_fork():
        return None
    import multiprocessing

    ctx = multiprocessing.get_context("fork")
    parent_end, child_end = ctx.Pipe(duplex=True)
    claims = ctx.Value("i", 0)  # the next close-up to draw, shared by both processes
    proc = ctx.Process(target=_child, args=(child_end, os.getpid(), claims), name="landcheck-figures", daemon=True)
    proc.start()
    child_end.close()
    return FigureWorker(proc, parent_end, claims)


def _claimed(claims, n: int) -> Iterator[int]:
    """Places 0..n-1 of the close-up order, each handed to one process only, whichever asks first."""
    while True:
        with claims.get_lock():
            k = claims.value
            if k >= n:
                return
            claims.value = k + 1
        yield k


class FigureWorker:
    """The parent's handle: :meth:`submit` a job, :meth:`collect` the figures, :meth:`stop` on failure."""

    def __init__(self, proc, conn, claims):
        self._proc = proc
        self._conn = conn
        self._claims = claims
        self._submitted = False
        self._done: DrawnFigures | None = None
        self._progress = 0

    def submit(self, job: FigureJob) -> None:
        """Hand the job over (once); the worker starts drawing."""
        if self._submitted:
            raise RuntimeError("a figure job was already submitted")
        self._conn.send(job)
        self._submitted = True

    def closeup_places(self, n: int) -> Iterator[int]:
        """Close-ups left for this process to draw (see :func:`_claimed`)."""
        return _claimed(self._claims, n)

    def collect(self, on_progress: Callable[[int], None] | None = None) -> DrawnFigures:
        """Wait for the figures; ``on_progress(n)`` after each message with the close-ups drawn so far."""
        while self._done is None:
            self._read()
            if on_progress is not None:
                on_progress(self._progress)
        self._proc.join()
        self._conn.close()
        return self._done

    def stop(self) -> None:
        """End the worker now (the report failed or was interrupted); never raises."""
        with contextlib.suppress(Exception):
            self._conn.close()
        if self._proc.is_alive():
            with contextlib.suppress(Exception):
                self._proc.kill()
        with contextlib.suppress(Exception):
            self._proc.join(5.0)

    def _read(self) -> None:
        try:
            kind, value = self._conn.recv()
        except (EOFError, OSError):
            self._proc.join(5.0)
            raise OutputWriteError(
                f"report: the process drawing the close-ups ended unexpectedly (exit code {self._proc.exitcode}; "
                "-9 is often the system stopping it for lack of memory); run again, or with "
                "LANDCHECK_REPORT_PROCESSES=1 in the environment to draw in one process."
            ) from None
        if kind == "drawn":
            self._progress = int(value)
        elif kind == "done":
            self._done = value
        elif kind == "error":
            self._proc.join(5.0)
            raise value
        else:  # pragma: no cover - the child sends nothing else
            raise RuntimeError(f"figure worker: unexpected message {kind!r}")


def _child(conn, parent_pid: int, claims) -> None:
    """The worker process: wait for a job, draw it, send the result; always ends with ``os._exit``."""
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C reaches the whole group; the parent decides
    die_with_parent()
    if os.getppid() != parent_pid:  # the parent ended before the line above took effect
        os._exit(1)
    gc.freeze()  # inherited objects stay out of the collector's walks: their pages stay shared
    code = 0
    try:
        warm_up()  # while the parent writes the tables this needs
        job = conn.recv()
        conn.send(("done", _draw(job, conn, claims)))
    except EOFError:  # the parent went away before handing over a job
        code = 1
    except BaseException as exc:  # handed to the parent, which raises it
        code = 1
        with contextlib.suppress(Exception):
            conn.send(("error", _picklable(exc)))
    finally:
        with contextlib.suppress(Exception):
            conn.close()
        os._exit(code)  # no atexit handlers or buffers of the parent's run here


def _draw(job: FigureJob, conn, claims) -> DrawnFigures:
    """The worker's part: the charts, then close-ups taken from the shared counter."""
    folder = closeup_folder(job)
    drawn = [0]

    def step() -> None:
        drawn[0] += 1
        # a figure is a web of cycles: collected now (cheap, the inherited objects are frozen), its
        # buffers do not pile up until the collector's next full pass
        gc.collect()
        conn.send(("drawn", drawn[0]))

    charts = [list(c.items) for c in draw_charts(folder, job)]
    places = _claimed(claims, max(0, job.max_closeups))
    closeups = draw_closeups(folder, job, on_drawn=step, places=places)
    return DrawnFigures(list(closeups.items), charts)


def closeup_folder(job: FigureJob):
    """The folder as the close-ups of ``job`` read it: only the parcels they show, rasters from ``job``."""
    from landcheck.evidence.folder import load_audit_folder

    folder = load_audit_folder(job.out_dir)
    if job.parcel_rows is not None:
        folder.use_parcel_subset(job.parcel_rows, job.parcel_shapes)
    if job.raster_files:
        folder.use_raster_files(job.raster_files)
    return folder


def draw_overview(folder, job: FigureJob, map_data):
    """The report's overview map of ``job`` (one definition for the worker and the one-process report)."""
    from landcheck.evidence.maps import overview_map

    return overview_map(
        folder,
        slope_breaks_pct=job.slope_breaks_pct,
        map_data=map_data,
        dest_dir=job.figures_dir,
        dpi=job.dpi,
        formats=_formats(job.figure_formats),
    )


def closeup_subset(folder, max_closeups: int):
    """The rows of ``folder.parcels`` the close-ups show, and every parcel shape their frames touch.

    Close-ups go to the largest conflict areas (:func:`landcheck.evidence.maps.closeup_order`); a frame
    (:func:`landcheck.evidence.maps.closeup_frame`) shows each parcel whose shape intersects it, so the
    shapes kept are those intersecting any frame, in file order.  Drawn from this subset, every close-up
    is the one drawn from the whole folder (tests/test_figure_worker.py compares the files).
    """
    import numpy as np
    import shapely

    from landcheck.evidence.maps import _cell_width, closeup_frame, closeup_order

    df, gdf = folder.parcels, folder.parcels_gdf
    pids = closeup_order(df, max_closeups)
    rows = df[df["parcel_id"].isin(pids)]
    targets = gdf[gdf["parcel_id"].isin(pids)]
    cell = None if targets.empty else _cell_width(folder)  # read once, not once per frame
    frames = [closeup_frame(folder, g, cell) for g in targets.geometry if g is not None and not g.is_empty]
    if not frames:
        return rows, gdf.iloc[:0]
    hit = gdf.sindex.query(shapely.box(*np.asarray(frames).T), predicate="intersects")[1]
    return rows, gdf.iloc[np.unique(hit)]


def draw_closeups(folder, job: FigureJob, on_drawn=None, places: Iterable[int] | None = None):
    """The report's close-ups of ``job`` (one definition for the worker and the one-process report);
    ``places``: only these places of the order (see :func:`landcheck.evidence.maps.parcel_closeup_maps`)."""
    from landcheck.evidence.maps import parcel_closeup_maps

    # close-ups are many: PNG by default (SVG on request) to keep the audit quick
    return parcel_closeup_maps(
        folder,
        job.max_closeups,
        slope_breaks_pct=job.slope_breaks_pct,
        dest_dir=job.figures_dir,
        dpi=job.dpi,
        formats=_formats(job.closeup_formats),
        on_drawn=on_drawn,
        ranks=places,
    )


def warm_up() -> None:
    """Load what drawing needs (matplotlib's modules and fonts, the compiled display loops) ahead of the job."""
    import io

    import numpy as np

    from landcheck.evidence.display_loops import add_block_bits, add_block_means
    from landcheck.evidence.maps import _halo, _new_figure

    cells = np.zeros((2, 2), dtype=np.float32)
    add_block_means(cells, np.float32(0), False, 2, 0, np.zeros((1, 1)), np.zeros((1, 1), dtype=np.int64))
    add_block_bits(cells.astype(np.uint8), np.uint8(255), 2, 0, np.zeros((1, 1), np.uint8), np.zeros((1, 1), bool))
    fig = _new_figure((1.0, 1.0), 50)
    ax = fig.add_axes([0.1, 0.1, 0.8, 0.8])
    ax.imshow(np.zeros((2, 2, 4), dtype=np.uint8))
    ax.text(0.5, 0.5, "0", path_effects=_halo(2.0))
    ax.plot([0, 1], [0, 1], label="a")
    ax.legend(title="b")
    fig.savefig(io.BytesIO(), format="png")


def draw_charts(folder, job: FigureJob) -> list:
    """The report's three charts of ``job`` (one definition for the worker and the one-process report)."""
    from landcheck.evidence.charts import class_share_chart, sensitivity_chart, slope_distribution_chart

    formats = _formats(job.figure_formats)
    return [
        chart(folder, dest_dir=job.figures_dir, dpi=job.dpi, formats=formats)
        for chart in (class_share_chart, slope_distribution_chart, sensitivity_chart)
    ]


def _formats(formats: Sequence[str]) -> tuple[str, ...]:
    return tuple(dict.fromkeys(("png", *formats)))


def _picklable(exc: BaseException) -> BaseException:
    import pickle

    try:
        pickle.loads(pickle.dumps(exc))
        return exc
    except Exception:
        text = "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
        return RuntimeError(f"figure worker failed:\n{text}")
