"""A tiny stage graph for testing the runner without the real stages.

``index`` (night) turns raw headers into a block index, ``scale`` (per
stretch) multiplies the raw rows, ``smooth`` (per stretch) box-filters
``scale``'s image along the scan axis, and ``total`` (night) adds up the
stretches.  Everything is small numpy work with results known exactly.
``PARTIAL_GRAPH`` is the same with ``total`` declared ``partial_inputs=True``
(it adds up the stretches that exist).  ``NEIGHBOUR_GRAPH`` has ``seams``
(per stretch), which takes its neighbours' ``scale`` products and puts their
edge rows around its own.  ``scale``'s option ``fail_on`` lists
stretch indices it fails on (a ValueError).

Fault injection for the resume tests, through the environment (so that it
reaches worker processes and does not change the config hash):
``ZDRIFT_TOY_DIE_ON=<stretch index>`` makes ``scale`` kill its own process
with ``os._exit`` on that stretch: every time, or, if ``ZDRIFT_TOY_DIE_MARK``
names a file, only once (it creates the file first and does not die if the
file exists).  ``ZDRIFT_TOY_FAIL_ON=<stretch index>`` makes ``scale`` raise a
ValueError on that stretch (a crash on odd data, fixed by a later release).
``WARM_GRAPH``'s ``scale`` warms its workers with :func:`slow_warm_up`,
which records when it ended in the folder ``ZDRIFT_TOY_WARM_DIR`` names.

This module lives in ``tests/`` (on ``sys.path`` under pytest), so worker
processes started by the local pool and by dask can import it by name.
"""

from __future__ import annotations

import dataclasses
import os
import time
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table
from pydantic import BaseModel, ConfigDict

from pipeline.products import image_hdulist
from pipeline.stages.base import BLOCK_INDEX, NEIGHBOURS, RAW_FILES, RAW_ROWS, Stage

N_COLUMNS = 6


class _Options(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class IndexOptions(_Options):
    sequence_keyword: str = "BLOCKSEQ"


class ScaleOptions(_Options):
    factor: float = 2.0
    fail_on: list[int] = []


class SmoothOptions(_Options):
    width: int = 3


class TotalOptions(_Options):
    label: str = "sum"


def build_index(*, inputs, options, context):
    good = [f for f in inputs[RAW_FILES] if f.error is None]
    good.sort(key=lambda f: f.header[options.sequence_keyword])
    starts = np.cumsum([0] + [f.header["NAXIS2"] for f in good])[:-1]
    index = Table(
        {
            "file": [f.name for f in good],
            "hdu": [f.hdu for f in good],
            "row_start": starts.astype(int),
            "n_rows": [f.header["NAXIS2"] for f in good],
        }
    )
    rejected = {f.name: f.error for f in inputs[RAW_FILES] if f.error is not None}
    return {BLOCK_INDEX: index, "rejected": rejected}


def scale_rows(*, inputs, options, context):
    stretch = context.stretch
    if stretch.index in options.fail_on:
        raise ValueError(f"toy failure on stretch {stretch.index}")
    if os.environ.get("ZDRIFT_TOY_FAIL_ON") == str(stretch.index):
        raise ValueError(f"toy crash on stretch {stretch.index}")
    if os.environ.get("ZDRIFT_TOY_DIE_ON") == str(stretch.index):
        mark = os.environ.get("ZDRIFT_TOY_DIE_MARK")
        if mark is None:
            os._exit(3)
        if not Path(mark).exists():
            Path(mark).touch()
            os._exit(3)
    image = inputs[RAW_ROWS] * np.float32(options.factor)
    header = fits.Header({"FACTOR": options.factor})
    return {
        "image": image,
        "mask": ~np.isfinite(image),
        "framed": fits.ImageHDU(image[stretch.core], header=header),
        "stats": {"core_sum": float(np.nansum(image[stretch.core])), "rows": stretch.n_rows},
    }


def image_rows(*, inputs, options, context):
    """:func:`scale_rows`' image and mask as an image product (``pipeline.products``)."""
    products = scale_rows(inputs=inputs, options=options, context=context)
    image = products["image"]
    flags = products["mask"].astype(np.uint16)
    empty = fits.Header()
    product = image_hdulist(
        image, np.abs(image), flags, unit="electron", header=empty, metadata=empty
    )
    return {"image": product}


def smooth_rows(*, inputs, options, context):
    image = inputs["scale"]["image"]
    kernel = np.ones(options.width) / options.width
    smoothed = np.apply_along_axis(np.convolve, 0, image, kernel, mode="same")
    return {"image": smoothed[context.stretch.core]}


def add_up(*, inputs, options, context):
    sums = [float(products["image"].sum()) for products in inputs["smooth"]]
    stretches = [s.index for s in context.input_stretches]  # all, unless partial_inputs
    table = Table({"stretch": np.array(stretches, dtype=int), options.label: sums})
    return {"per_stretch": table, "summary": {"total": float(np.sum(sums)), "n": len(sums)}}


class SeamOptions(_Options):
    margin: int = 2


def seam_rows(*, inputs, options, context):
    """The stretch's own rows of ``scale``'s image product with ``margin`` rows of each
    neighbour's own rows around them (NaN where a neighbour is missing), read with
    ``section`` so that only those rows of a neighbour are loaded."""
    stretch, margin = context.stretch, options.margin
    own = inputs["scale"]["image"]["FLUX"].data[stretch.core]
    parts = [own]
    for side, products in zip((-1, 1), inputs[NEIGHBOURS]["scale"], strict=True):
        part = np.full((margin, own.shape[1]), np.nan, np.float32)
        if products is not None:
            core = context.stretches[stretch.index + side].core  # its products cover [lo, hi)
            rows = (
                slice(core.stop - margin, core.stop)
                if side < 0
                else slice(core.start, core.start + margin)
            )
            part = products["image"]["FLUX"].section[rows, :]
        parts.insert(0 if side < 0 else len(parts), part)
    return {"image": np.vstack(parts)}


class ListFile(_Options):
    path: Path | None = None


class CountOptions(_Options):
    source: ListFile = ListFile()


def count_lines(*, inputs, options, context):
    """Lines of the file ``source.path`` (handed over as an ExternalFile), read in chunks."""
    handle = inputs["source.path"]
    if handle is None:
        return {"summary": {"lines": None}}
    with open(handle.path, encoding="utf-8") as text:  # the stage's own chunked reader
        return {"summary": {"lines": sum(1 for _ in text), "sha256": handle.sha256}}


#: Seconds :func:`slow_warm_up` takes: far longer than the ``index`` unit that
#: runs first, so that a ``scale`` unit that did not wait for it starts before it ends.
WARM_UP_SECONDS = 1.5


def slow_warm_up() -> None:
    """A worker's warm-up for ``scale``: sleeps, then writes when it ended (file: the pid)."""
    time.sleep(WARM_UP_SECONDS)
    folder = Path(os.environ["ZDRIFT_TOY_WARM_DIR"])
    (folder / str(os.getpid())).write_text(repr(time.time()))


GRAPH = (
    Stage("index", build_index, IndexOptions, (RAW_FILES,), "night", (), defines_rows=True),
    Stage("scale", scale_rows, ScaleOptions, (RAW_ROWS,), "stretch", ("camera.n_columns",)),
    Stage("smooth", smooth_rows, SmoothOptions, ("scale",), "stretch", ()),
    Stage("total", add_up, TotalOptions, ("smooth",), "night", ()),
)
PARTIAL_GRAPH = (*GRAPH[:3], dataclasses.replace(GRAPH[3], partial_inputs=True))
#: ``lines``: counts the lines of a file it reads itself (``streams``).
STREAM_GRAPH = (
    *GRAPH,
    Stage("lines", count_lines, CountOptions, ("total",), "night", (), streams=("source.path",)),
)
#: ``scale`` warms its workers up (a module that does not exist first: it is skipped).
WARM_GRAPH = (
    GRAPH[0],
    dataclasses.replace(
        GRAPH[1], warm=("no_such_module_of_zdrift", "_toy_graph:slow_warm_up", "scipy.special")
    ),
    *GRAPH[2:],
)
#: ``scale`` as an image product, and ``seams``: each stretch with its neighbours' edge rows.
NEIGHBOUR_GRAPH = (
    GRAPH[0],
    dataclasses.replace(GRAPH[1], run=image_rows),
    Stage("seams", seam_rows, SeamOptions, ("scale",), "stretch", (), neighbours=("scale",)),
)


def write_raw_night(raw_dir: Path, n_blocks: int = 4, rows_per_block: int = 25) -> np.ndarray:
    """Write a toy night of raw blocks (uint16 with BZERO) and return its rows.

    Block files are named so that their alphabetical order differs from the
    BLOCKSEQ order, which the index stage must follow.
    """
    raw_dir.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(12345)
    night = rng.integers(1000, 60000, size=(n_blocks * rows_per_block, N_COLUMNS))
    night = night.astype(np.uint16)
    for seq in range(n_blocks):
        block = night[seq * rows_per_block : (seq + 1) * rows_per_block]
        hdu = fits.PrimaryHDU(block, header=fits.Header({"BLOCKSEQ": seq}))
        hdu.writeto(raw_dir / f"block_{(7 * seq) % n_blocks}_{seq}.fits")
    return night.astype(np.float64)


def edit_raw_block(raw_dir: Path, sequence: int) -> None:
    """Add 1 to the first pixel of the raw block with BLOCKSEQ ``sequence``."""
    path = next(p for p in raw_dir.iterdir() if p.name.endswith(f"_{sequence}.fits"))
    before = path.stat()
    with fits.open(path, mode="update") as hdul:
        hdul[0].data[0, 0] += 1
    # The edit keeps the size; the runner sees it through the modification
    # time (raw_files_fingerprint).  On a file system with 1-second time stamps
    # an edit within the same second would keep that too, so the test sets the
    # time an edit one second later would leave, rather than relying on the clock.
    assert path.stat().st_size == before.st_size
    os.utime(path, ns=(before.st_atime_ns, before.st_mtime_ns + 1_000_000_000))


def toy_config_data(tmp: Path) -> dict:
    """A config mapping for the toy night under ``tmp``."""
    return {
        "night": {"name": "toy", "raw_dir": str(tmp / "raw"), "output_dir": str(tmp / "out")},
        "site": {"latitude": -20.0, "longitude": 30.0, "name": "Fictional Ridge"},
        "camera": {
            "n_columns": N_COLUMNS,
            "tdi_rows": 16,
            "pixel_size": 15.0,
            "focal_length": 4.0,
        },
        "run": {"stretch_rows": 30, "overlap_rows": 4, "executor": "serial"},
    }
