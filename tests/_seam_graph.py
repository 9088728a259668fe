"""The real detect and catalog stages behind a stand-in for rectify, for runner tests.

The stand-in (``rectify``) cuts one rendered scene into stretches: stretch
``[start, stop)`` of the night's rows gets the scene's columns ``[start,
stop)``, so the products tile the night's columns exactly, without overlap,
as rectify's do, in rectify's product format (image product with a
celestial WCS and the NIGHT grid, ``smear_kernels``).  The scene
(:func:`scene`) is 128 x 800 pixels with four stars: two on seams (first
moments 0.3 px either side of the seams at x = 199.5 and 399.5: pixel
centres are integers), two in the middle of stretches 1 and 2, none in
stretch 3.

Options: ``fail_on`` lists stretch indices the stand-in fails on,
``flag_all`` those whose every pixel it flags as outside the data,
``noise_correlation`` goes to the ``NOISECOR`` card.  Its sky
level carries ``raw[0, 0] mod 7`` of the stretch's first raw row, so editing
that pixel of a raw block changes that one stretch's product (a changed
rectified stretch).

Lives in ``tests/`` so that pool and dask workers can import it by name.
"""

from __future__ import annotations

import functools

import numpy as np
from _detect_scene import kernel_table, render_scene
from _toy_graph import GRAPH, write_raw_night
from astropy.io import fits
from pydantic import BaseModel, ConfigDict

from pipeline.masks import MaskBit
from pipeline.products import image_hdulist, night_grid_header
from pipeline.stages import catalog, detect
from pipeline.stages.base import RAW_ROWS, Stage

#: Stars (night column, row) of the scene, in stretches 0, 1, 2, 2; each has 5e4 e-.
STARS_X = (199.2, 300.0, 399.8, 500.0)
STARS_Y = (64.0, 70.0, 64.0, 58.0)
FLUX = 5.0e4
SHAPE = (128, 800)
STRETCH_ROWS = 200


@functools.cache
def scene():
    """The rendered scene (noise seeded), the same in every process."""
    return render_scene(STARS_X, STARS_Y, FLUX, shape=SHAPE, x_start=0, seed=4)


class StandInOptions(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)
    fail_on: list[int] = []
    flag_all: list[int] = []
    noise_correlation: float = 1.0


def celestial_header(x_start: int) -> fits.Header:
    """A plate carree WCS of 1 arcsec pixels on the equator, with the NIGHT grid."""
    header = fits.Header()
    header["CTYPE1"], header["CTYPE2"] = "RA---CAR", "DEC--CAR"
    header["CUNIT1"], header["CUNIT2"] = "deg", "deg"
    header["CRPIX1"], header["CRPIX2"] = 1.0 - x_start, 1.0
    header["CRVAL1"], header["CRVAL2"] = 30.0, 0.0
    header["CDELT1"], header["CDELT2"] = 1.0 / 3600.0, 1.0 / 3600.0
    header.update(night_grid_header(x_start, 0, ("X", "Y"), ("night column", "row")))
    return header


def stand_in_rectify(*, inputs, options, context):
    stretch = context.stretch
    if stretch.index in options.fail_on:
        raise ValueError(f"stand-in failure on stretch {stretch.index}")
    columns = slice(stretch.start, stretch.stop)
    picture = scene()
    offset = float(inputs[RAW_ROWS][stretch.core][0, 0] % 7)
    image = picture.image[:, columns] + offset
    variance = picture.variance[:, columns]
    flags = picture.mask[:, columns].copy()
    if stretch.index in options.flag_all:
        image = np.full(image.shape, np.nan)
        variance = image.copy()
        flags[:] = MaskBit.OUTSIDE
    product = image_hdulist(
        image.astype(np.float32),
        variance.astype(np.float32),
        flags,
        unit="electron",
        header=celestial_header(stretch.start),
        metadata=fits.Header(),
    )
    product["FLUX"].header["NOISECOR"] = options.noise_correlation
    kernels = kernel_table(SHAPE[0], stretch.start, stretch.stop - stretch.start, 12.0, 2.0)
    return {"image": product, "smear_kernels": kernels}


GRAPH_WITH_DETECT = (
    GRAPH[0],
    Stage("rectify", stand_in_rectify, StandInOptions, (RAW_ROWS,), "stretch", ()),
    detect.STAGE,
    catalog.STAGE,
)


def seam_night_data(tmp) -> dict:
    """Raw blocks of 200 rows (one per stretch) and a config mapping for them."""
    write_raw_night(tmp / "raw", n_blocks=SHAPE[1] // STRETCH_ROWS, rows_per_block=STRETCH_ROWS)
    return {
        "night": {"name": "seams", "raw_dir": str(tmp / "raw"), "output_dir": str(tmp / "out")},
        "site": {"latitude": -20.0, "longitude": 30.0, "name": "Fictional Ridge"},
        "camera": {"n_columns": 6, "tdi_rows": 16, "pixel_size": 15.0, "focal_length": 4.0},
        "run": {"stretch_rows": STRETCH_ROWS, "overlap_rows": 0, "executor": "serial"},
    }
