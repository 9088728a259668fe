"""Sky level and quick-look pixels from rectified images (pure functions on arrays)."""

from __future__ import annotations

import itertools

import numpy as np
from astropy.coordinates import SkyCoord
from astropy.table import Table
from astropy.wcs import WCS

__all__ = [
    "bin_image",
    "measure_sky",
    "pixel_area_arcsec2",
    "place_pieces",
    "sky_surface_brightness",
]


def pixel_area_arcsec2(wcs: WCS, x: float, y: float) -> float:
    """Solid angle of the pixel at ``(x, y)`` (0-based), arcsec^2.

    Measured on the sky (the separations of the pixel's edge midpoints), not
    on the projection plane: the rectified images use a plate carree whose
    plane scale is not the sky scale away from its native equator.

    Parameters
    ----------
    wcs : astropy.wcs.WCS
        A celestial WCS with orthogonal axes (RA and Dec of the rectified
        product).
    x, y : float
        Pixel position, 0-based.
    """
    ends = wcs.pixel_to_world([x - 0.5, x + 0.5, x, x], [y, y, y - 0.5, y + 0.5])
    if not isinstance(ends, SkyCoord):
        raise TypeError(f"wcs must be a celestial WCS; it maps pixels to {type(ends).__name__}.")
    along = ends[0].separation(ends[1]).arcsec
    across = ends[2].separation(ends[3]).arcsec
    return float(along * across)


def measure_sky(
    flux: np.ndarray,
    usable: np.ndarray,
    *,
    x_start: int,
    exposure: float,
    n_bins: int,
) -> Table:
    """Sky level in bins along the scan of one rectified stretch.

    Parameters
    ----------
    flux : ndarray, shape (ny, nx)
        Rectified image, electrons per pixel; axis 1 is along the scan.
    usable : ndarray of bool, shape (ny, nx)
        Pixels to use (finite, no flag).
    x_start : int
        Night column of ``flux[:, 0]``.
    exposure : float
        Exposure of a pixel (TDI rows x line time), s.
    n_bins : int
        Bins along the scan (fewer if the image is narrower).

    Returns
    -------
    astropy.table.Table
        ``x`` (night column of the bin centre, pix), ``sky_rate`` (median of
        the usable pixels per second, electron / (s pix); NaN where a bin has
        none) and ``n_pixels``.  The median of a field of faint stars is the
        sky to within a small fraction of the star light (common practice).
    """
    flux = np.asarray(flux, dtype=float)
    usable = np.asarray(usable, dtype=bool) & np.isfinite(flux)
    if flux.ndim != 2 or usable.shape != flux.shape:
        raise ValueError(
            f"flux and usable must be 2-D arrays of one shape; got {flux.shape} and {usable.shape}."
        )
    if not exposure > 0:
        raise ValueError(f"exposure must be > 0 s; got {exposure}.")
    edges = np.linspace(0, flux.shape[1], min(n_bins, flux.shape[1]) + 1).round().astype(int)
    rates, centres, counts = [], [], []
    for lo, hi in itertools.pairwise(edges):
        values = flux[:, lo:hi][usable[:, lo:hi]]
        counts.append(values.size)
        rates.append(np.median(values) / exposure if values.size else np.nan)
        centres.append(x_start + 0.5 * (lo + hi - 1))
    table = Table({"x": centres, "sky_rate": rates, "n_pixels": counts})
    table["x"].unit = "pix"
    table["sky_rate"].unit = "electron / (s pix)"
    return table


def sky_surface_brightness(
    sky_rate: np.ndarray, pixel_area: np.ndarray | float, zero_point: float
) -> np.ndarray:
    """Sky surface brightness, mag/arcsec^2.

    ``zero_point - 2.5 log10(sky_rate / pixel_area)``: the magnitude of the
    light falling on one square arcsecond (Pogson's magnitude scale; the zero
    point is the magnitude giving 1 electron per second).

    Parameters
    ----------
    sky_rate : ndarray
        Sky, electron / (s pix); values <= 0 give NaN.
    pixel_area : float or ndarray
        Pixel solid angle, arcsec^2.
    zero_point : float
        Magnitude of 1 electron per second, mag.
    """
    per_area = np.asarray(sky_rate, dtype=float) / np.asarray(pixel_area, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(per_area > 0, zero_point - 2.5 * np.log10(per_area), np.nan)


def bin_image(data: np.ndarray, factor: int) -> np.ndarray:
    """Block-average an image by ``factor`` on both axes, ignoring NaN.

    Parameters
    ----------
    data : ndarray, shape (ny, nx)
        NaN marks pixels without data.
    factor : int
        Block size; the ragged last blocks are averaged over what they hold.

    Returns
    -------
    ndarray, shape (ceil(ny / factor), ceil(nx / factor))
        NaN where a block holds no finite pixel.
    """
    if factor < 1:
        raise ValueError(f"factor must be >= 1; got {factor}.")
    data = np.asarray(data, dtype=float)
    ny, nx = data.shape
    py, px = -ny % factor, -nx % factor
    padded = np.pad(data, ((0, py), (0, px)), constant_values=np.nan)
    blocks = padded.reshape(padded.shape[0] // factor, factor, padded.shape[1] // factor, factor)
    finite = np.isfinite(blocks)
    total = np.where(finite, blocks, 0.0).sum(axis=(1, 3))
    count = finite.sum(axis=(1, 3))
    with np.errstate(invalid="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), np.nan)


def place_pieces(pieces: list[tuple[int, np.ndarray]], factor: int) -> np.ndarray:
    """Lay binned stretch images side by side at their night columns.

    Parameters
    ----------
    pieces : list of (int, ndarray)
        ``(x_start, binned image)``: night column of the unbinned image's
        first column (a multiple of ``factor`` keeps the seams exact) and the
        image binned by ``factor``.
    factor : int
        The binning factor.

    Returns
    -------
    ndarray, shape (max ny, last column)
        The strip from night column 0; NaN where no stretch lies (gaps).  A
        stretch that starts before night column 0 (the first one's rectified
        frame may, by a column or so) is shown from there: its binned
        columns before it are left out.
    """
    if not pieces:
        raise ValueError("pieces is empty: there is no rectified stretch to show.")
    starts = [x // factor for x, _ in pieces]
    ny = max(image.shape[0] for _, image in pieces)
    nx = max(start + image.shape[1] for start, (_, image) in zip(starts, pieces, strict=True))
    strip = np.full((ny, max(nx, 0)), np.nan)
    for start, (_, image) in zip(starts, pieces, strict=True):
        shown = image[:, max(-start, 0) :]
        first = max(start, 0)
        strip[: shown.shape[0], first : first + shown.shape[1]] = shown
    return strip
