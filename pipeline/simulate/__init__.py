"""Synthetic raw TDI blocks with known truth, for the demo night and the tests.

:func:`simulate_night` builds, in memory, a night of raw TDI blocks that follow
the raw data contract (DEVELOPERS.md, "Raw data"), a truth table and a reference
catalogue; :func:`write_night` writes them as FITS and ECSV files.  The CLI
(``zdrift simulate CONFIG``) and ``python -m pipeline.simulate CONFIG`` read
the ``site``, ``camera`` and ``simulate`` sections of a YAML config.

What is simulated
-----------------
* **Stars** along their exact strip tracks (:class:`pipeline.geometry.tdi.TDIModel`),
  sampled uniformly in time at better than ``1 / samples_per_pixel`` pixel
  spacing, each sample a pixel-integrated seeing PSF (Gaussian, or Moffat as a
  Gaussian mixture; see :mod:`pipeline.simulate._render`).  Flux in photo-electrons is
  ``10**(-0.4 (m - zero_point))`` per second of crossing; a passing cloud
  scales each time sample by the transparency at that time.
* **Star field**: uniform on the sphere over the strip, magnitudes from a
  power-law luminosity function ``log10 N(<m) = const + slope * m`` (slope
  ~0.3-0.35 per magnitude is typical of faint star counts at intermediate
  galactic latitude; common practice), colours and small proper motions drawn
  from normal distributions.  No galactic-latitude dependence is modelled.
  Optionally the real stars of the packaged Gaia DR3 bright-star or
  Hipparcos-2 catalogue inside the strip are added (their G or Hp magnitude is
  used as the passband magnitude).
* **Sky**: ``sky_brightness`` mag/arcsec^2 with a linear ramp over the night,
  integrated over each output row's exposure window, dimmed by the cloud.
* **Detector** (DEVELOPERS.md, "TDI detector facts"): 1-D column response (vignetting + random
  rms) with a few dead/low columns, per-column dark with a few hot columns,
  Poisson noise, cosmic rays (sharp, after the optical image), full-well bleed
  along the columns, read noise, a bias that drifts slowly along the scan plus
  a fixed column pattern, a serial overscan that carries each row's bias,
  rounding and clipping at ``SATURATE``.  Optionally the start-of-scan ramp
  (clocking starts with the first block, so its first ``tdi_rows`` rows are
  partially exposed).
* **Line-time error** ``line_time_error = eps``: the camera really clocks at
  ``dt_true = dt_nominal * (1 + eps)``, where ``dt_nominal`` is the camera's
  configured line time or, if none, the one matching the drift.  The strip
  geometry and every block's DATE-OBS (a block start is time-stamped by an
  independent clock) use ``dt_true``; the header ``LINETIME`` says
  ``dt_nominal``.  Stars are then smeared along the scan by ``tdi_rows * eps``
  rows.
* **Missing blocks**: block numbers in ``missing_blocks`` are simulated (the
  truth keeps their stars) but not returned or written.
* **The night as it really was** (``actual``, :class:`ActualOptions`): true
  values the reduction config does not know.  ``clock_offset``: the headers'
  times are that many seconds ahead of the true ones (row 0 was really read at
  ``start - clock_offset``); ``focal_length_scale``, ``rotation_offset``
  (deg), ``tilt_east_offset``, ``tilt_north_offset`` (arcsec) and
  ``distortion_k1_offset`` (rad^-2) make the true camera; ``wander`` displaces
  every image sinusoidally along and across the scan (:class:`WanderOptions`);
  ``flat_error`` takes a fraction of the star light out of a band of columns
  while the sky keeps it, a flat-field error the sky's flat cannot show
  (:class:`~pipeline.simulate._actual.FlatErrorOptions`).
  The camera then clocks ``1 + line_time_error`` times the line time matching
  the *true* drift (or its set ``camera.line_time``).  Headers carry only what
  the config implies (DATE-OBS from ``start``, LINETIME from the config's
  camera); the truth table's positions are the true ones, and its meta holds
  ``actual`` (the true clock, focal length, plate scale, rotation, tilts,
  distortion, line time and wander; absent when nothing differs).
* **Several nights of one strip** (``nights``, :class:`RepeatOptions`):
  :func:`simulate_nights` simulates the first night and each listed one,
  ``days`` sidereal days later at the same local apparent sidereal time, over
  one shared star field (truth ``id`` is the same star in every night), each
  with its own seeing, sky, transparency (``sky.zero_point``, clouds), trails
  and noise; the camera is shared.  ``python -m pipeline.simulate`` writes
  them to one folder per night, named by the UTC date of its start.
* **Photometric truth**: the truth's meta ``photometry``
  (:func:`photometry_record`) holds the zero point, the reference colour
  term, the cloud and the flat-field error; :func:`true_zero_point` gives the
  zero point of a star crossing with mid-time ``t``, at the transparency
  averaged over its crossing (:func:`mean_transparency`).
* **Satellite trails** (``trails``, :class:`TrailOptions`): a point crossing
  the detector in a straight line at a given time, angle, speed and
  magnitude, rendered with the seeing PSF; the truth's meta ``trails`` records
  each one's strip ends, times and electrons per pixel.

Coordinates: night (strip) row ``r`` counts rows from row 0 of block 0 (the
scan axis, time); block ``b`` holds rows ``[b * block_rows, (b+1) * block_rows)``.
Column ``c`` is the image column (the cross-scan axis); pixel ``k`` covers
``[k - 0.5, k + 0.5)``.  With ``camera.flip_columns`` the written columns are
reversed (``c_file = n_columns - 1 - c``); the truth table gives both.
"""

from __future__ import annotations

import argparse
import datetime
import functools
import gzip
import io
import logging
import re
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from pipeline._offline import astropy_offline
from pipeline.config import load_config
from pipeline.exceptions import ConfigError
from pipeline.geometry.instrument import Camera, Site
from pipeline.geometry.optics import resolve_focal_length
from pipeline.simulate._actual import (
    ActualOptions,
    WanderingTDIModel,
    WanderOptions,
    actual_record,
    true_camera,
)
from pipeline.simulate._detector import (
    ColumnProperties,
    bleed_along_columns,
    cosmic_ray_hits,
    digitise,
    draw_column_properties,
    exposure_fraction,
)
from pipeline.simulate._exposure import (
    bleed_trails,
    mean_transparency,
    sample_tracks,
    samples_needed,
    sky_rows,
    trails_in_block,
    transparency,
)
from pipeline.simulate._render import GaussianMixturePSF, render_tracks
from pipeline.simulate._starfield import (
    catalog_stars,
    draw_magnitudes,
    draw_star_field,
    field_bounds,
)
from pipeline.simulate._starfield import extra_stars as user_stars
from pipeline.simulate._trail import TrailOptions, trail_samples
from pipeline.simulate._truth import reference_table, truth_table

if TYPE_CHECKING:
    from astropy.io import fits
    from astropy.table import Table

__all__ = [
    "ActualOptions",
    "DetectorOptions",
    "PSFOptions",
    "ReferenceOptions",
    "RepeatOptions",
    "SimulateOptions",
    "SimulatedNight",
    "SimulationOptions",
    "SkyOptions",
    "StarOptions",
    "TrailOptions",
    "WanderOptions",
    "column_properties",
    "draw_magnitudes",
    "draw_star_field",
    "load_simulation_config",
    "main",
    "mean_transparency",
    "night_options",
    "photometry_record",
    "simulate_night",
    "simulate_nights",
    "simulate_to_folders",
    "tdi_model",
    "true_zero_point",
    "write_night",
]

log = logging.getLogger(__name__)


class _Options(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class PSFOptions(_Options):
    """Seeing point-spread function."""

    model: Literal["gaussian", "moffat"] = Field("moffat", description="profile")
    fwhm: float = Field(1.4, gt=0, description="FWHM in arcsec")
    beta: float = Field(3.5, gt=1.5, description="Moffat index")
    # Eight Gauss-Laguerre components follow the Moffat profile to 3e-4 of its
    # peak at beta 3.5 (5e-5 at beta 5; more are needed for flatter wings);
    # four were 2.5e-3 off in the wings and six 8e-4, which a PSF fit of the
    # Moffat turned into fluxes 1.4 % and 0.2 % high (tests/test_detect.py).
    n_components: int = Field(8, ge=1, le=16, description="Gaussians approximating the Moffat")


class SkyOptions(_Options):
    """Photometric scale, sky brightness and transparency along the night."""

    zero_point: float = Field(27.8, description="magnitude giving 1 e-/s (at unit transparency)")
    sky_brightness: float = Field(20.8, description="sky at the start, mag/arcsec^2")
    sky_ramp: float = Field(0.1, ge=-0.9, description="fractional sky change, start to end")
    cloud_depth: float = Field(0.0, ge=0, lt=1, description="fraction of light lost at the dip")
    cloud_time: float = Field(0.5, description="dip centre, fraction of the night")
    cloud_width: float = Field(60.0, gt=0, description="dip Gaussian sigma, seconds")
    cloud_dims_sky: bool = Field(True, description="the cloud also dims the sky")


class StarOptions(_Options):
    """The synthetic star field (and optional real catalogue stars)."""

    density: float = Field(
        20000.0, ge=0, description="stars per deg^2 between mag_bright and mag_faint"
    )
    count: int | None = Field(None, ge=0, description="exact star count (overrides density)")
    mag_bright: float = 14.0
    mag_faint: float = 23.0
    slope: float = Field(0.33, ge=0, description="d log10 N(<m) / dm")
    colour_mean: float = Field(0.6, description="mean colour index, mag")
    colour_rms: float = Field(0.3, ge=0, description="colour spread, mag")
    pm_rms: float = Field(5.0, ge=0, description="proper-motion spread per axis, mas/yr")
    catalog: Literal["none", "gaia", "hipparcos"] = Field(
        "none", description="add real stars from a packaged catalogue"
    )
    catalog_mag_bright: float = Field(
        -2.0, description="skip catalogue stars brighter than this (their bleed fills a block)"
    )

    @model_validator(mode="after")
    def _check_range(self) -> StarOptions:
        if not self.mag_faint > self.mag_bright:
            raise ValueError(
                f"mag_faint ({self.mag_faint}) must exceed mag_bright ({self.mag_bright})."
            )
        return self


class DetectorOptions(_Options):
    """Camera electronics and detector defects (DEVELOPERS.md, "TDI detector facts")."""

    gain: float = Field(2.0, gt=0, description="e-/ADU")
    read_noise: float = Field(5.0, ge=0, description="e- rms")
    bias_level: float = Field(1000.0, description="ADU")
    bias_drift: float = Field(6.0, description="linear bias change over the night, ADU")
    bias_wave: float = Field(2.0, ge=0, description="amplitude of a slow bias wave, ADU")
    bias_wave_period: float = Field(1800.0, gt=0, description="seconds")
    bias_column_rms: float = Field(2.0, ge=0, description="fixed column pattern, ADU rms")
    full_well: float = Field(120000.0, gt=0, description="e- per packet")
    saturate: float | None = Field(
        None,
        gt=0,
        le=65535,
        description="ADU clip written as SATURATE; None: bias_level + 0.98 full_well / gain",
    )
    flat_rms: float = Field(0.02, ge=0, description="column response rms")
    vignetting: float = Field(0.02, ge=0, lt=1, description="response loss at the edges")
    dark_rate: float = Field(0.01, ge=0, description="e-/s per detector pixel")
    dark_rms: float = Field(0.002, ge=0, description="column-to-column dark rms, e-/s")
    hot_columns: int = Field(3, ge=0)
    hot_rate: float = Field(5000.0, ge=0, description="e-/s of a hot pixel")
    dead_columns: int = Field(2, ge=0)
    dead_response: tuple[float, float] = Field((0.0, 0.3), description="response range")
    cosmic_rate: float = Field(0.03, ge=0, description="events per cm^2 per second")
    cosmic_electrons: float = Field(2000.0, gt=0, description="mean charge per event, e-")

    @property
    def saturate_adu(self) -> float:
        """The ADU level written as SATURATE and at which data are clipped."""
        if self.saturate is not None:
            return float(self.saturate)
        return float(min(np.floor(self.bias_level + 0.98 * self.full_well / self.gain), 65535))


class ReferenceOptions(_Options):
    """The reference catalogue written next to the blocks."""

    epoch: float = Field(2016.0, description="Julian epoch of the positions")
    mag_limit: float = Field(21.0, description="faintest magnitude listed")
    position_error: float = Field(5.0, ge=0, description="rms per coordinate, mas")
    mag_error: float = Field(0.015, ge=0, description="rms, mag")
    colour_error: float = Field(0.02, ge=0, description="rms, mag")
    colour_term: float = Field(
        0.0,
        description="reference mag = passband mag + colour_term * colour (+ noise): the "
        "colour term c of m_ref - m_inst = Z + c * colour",
    )


class RepeatOptions(_Options):
    """Another night of the same strip (an entry of ``simulate.nights``).

    It starts ``days`` sidereal days after ``simulate.start``, adjusted to the
    same local apparent sidereal time, so the chip sweeps the same sky; its
    ``psf`` and ``sky`` entries replace those of the first night (seeing,
    zero point as transparency, sky brightness, clouds), its ``trails`` are
    its own.  Stars, camera and everything else are shared.
    """

    days: int = Field(ge=1, description="sidereal days after the first night")
    psf: dict = Field(default_factory=dict, description="changes to simulate.psf")
    sky: dict = Field(default_factory=dict, description="changes to simulate.sky")
    trails: tuple[TrailOptions, ...] = ()


class SimulationOptions(_Options):
    """Options of the ``simulate:`` config section (see the module docstring)."""

    seed: int = Field(0, ge=0, description="seed of every random stream")
    start: str = Field(
        description="UTC (ISO 8601) at which row 0 of block 0 is read, as the headers say"
    )
    n_blocks: int = Field(4, ge=1)
    block_rows: int = Field(1024, ge=1, description="rows per block (scan axis)")
    overscan_columns: int = Field(32, ge=0, description="serial overscan columns")
    filter: str = "r"
    object: str = "zenith drift scan"
    telescope: str | None = Field(
        None, description="TELESCOP of the raw files; null: camera.telescope"
    )
    file_prefix: str = Field("block_", pattern=r"^[A-Za-z0-9._-]*$")
    compress: bool = Field(True, description="write .fits.gz")
    data_type: Literal["uint16", "float32"] = "uint16"
    missing_blocks: tuple[int, ...] = ()
    line_time_error: float = Field(0.0, gt=-0.1, lt=0.1, description="fractional clock error")
    start_ramp: bool = Field(False, description="first tdi_rows rows partially exposed")
    noise: bool = Field(True, description="Poisson and read noise (off: expected values)")
    samples_per_pixel: float = Field(5.0, ge=1, description="track samples per pixel of path")
    clocking_box: bool = Field(True, description="one-row box of discrete TDI clocking")
    psf: PSFOptions = Field(default_factory=PSFOptions)
    sky: SkyOptions = Field(default_factory=SkyOptions)
    stars: StarOptions = Field(default_factory=StarOptions)
    detector: DetectorOptions = Field(default_factory=DetectorOptions)
    reference: ReferenceOptions = Field(default_factory=ReferenceOptions)
    actual: ActualOptions = Field(default_factory=ActualOptions)
    trails: tuple[TrailOptions, ...] = Field((), description="satellite trails")
    nights: tuple[RepeatOptions, ...] = Field(
        (), description="more nights of the same strip (simulate_nights)"
    )
    nights_pad: float = Field(
        2.0,
        ge=0,
        description="arcmin by which the shared star field of simulate.nights is widened "
        "(0: the first night's own field, so the first night is the one simulated alone)",
    )

    @field_validator("start")
    @classmethod
    def _check_start(cls, value: str) -> str:
        if _plain_utc_time(value):  # astropy reads it: no need to load astropy.time
            return value
        from astropy.time import Time

        try:
            Time(value, format="isot", scale="utc")
        except ValueError:
            raise ValueError(
                f"start must be an ISO 8601 UTC time such as '2026-10-15T23:30:00'; got {value!r}."
            ) from None
        return value


def _plain_utc_time(value: str) -> bool:
    """``value`` is ``YYYY-MM-DDThh:mm:ss[.fff]`` with a calendar date and a time of day.

    Every such string is one astropy's ``isot`` format reads; the others
    (leap seconds, shorter forms) are left to astropy.
    """
    if re.fullmatch(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d+)?", value, re.ASCII) is None:
        return False
    try:
        datetime.datetime.strptime(value[:19], "%Y-%m-%dT%H:%M:%S")
    except ValueError:
        return False
    return True


#: Name under which the config layer registers the section model.
SimulateOptions = SimulationOptions


@dataclass
class SimulatedNight:
    """A simulated night, in memory.

    Attributes
    ----------
    blocks : list of (astropy.io.fits.Header, ndarray)
        The written blocks in order (missing blocks left out).  Data shape
        ``(block_rows, n_columns + overscan_columns)``; axis 0 is the scan axis.
    truth : astropy.table.Table
        One row per simulated star (see :func:`simulate_night`).
    reference : astropy.table.Table
        The reference catalogue (subset of the truth with catalogue errors).
    meta : dict
        Line times, focal length, pixel scale, timings (s) and the options.
    """

    blocks: list[tuple[fits.Header, np.ndarray]]
    truth: Table
    reference: Table
    meta: dict = field(default_factory=dict)


# ----------------------------------------------------------------------------
# Geometry


def column_properties(
    options: SimulationOptions, n_columns: int, line_time: float, tdi_rows: int
) -> ColumnProperties:
    """The camera's per-column truth that :func:`simulate_night` uses.

    Drawn from the same seeded generator, so a test can compare a solved 1-D
    flat and dark with the truth without simulating the night again.

    Parameters
    ----------
    options : SimulationOptions
        The simulation options (seed and ``detector`` section).
    n_columns : int
        Image columns.
    line_time : float
        The camera's true line time, seconds.
    tdi_rows : int
        TDI rows (the exposure is ``tdi_rows * line_time``).

    Returns
    -------
    ColumnProperties
        ``response`` (the 1-D flat), ``dark`` (e- per output pixel), the bias
        pattern and the hot and dead column indices.
    """
    detector = options.detector
    return draw_column_properties(
        n_columns,
        np.random.default_rng([options.seed, 2]),
        flat_rms=detector.flat_rms,
        vignetting=detector.vignetting,
        dark_rate=detector.dark_rate,
        dark_rms=detector.dark_rms,
        integration_time=tdi_rows * line_time,
        line_time=line_time,
        hot_columns=detector.hot_columns,
        hot_rate=detector.hot_rate,
        dead_columns=detector.dead_columns,
        dead_response=detector.dead_response,
        bias_column_rms=detector.bias_column_rms,
    )


def tdi_model(site: Site, camera: Camera, options: SimulationOptions):
    """The TDI geometry the simulator uses, and the nominal line time.

    Parameters
    ----------
    site, camera : Site, Camera
        The instrument.
    options : SimulationOptions
        The simulation options (start time, rows, line-time error).

    Returns
    -------
    model : pipeline.geometry.tdi.TDIModel
        The true geometry: the true camera (``options.actual``), ``start`` the
        true time at which row 0 was read (``options.start - clock_offset``),
        the true line time (``dt_nominal * (1 + line_time_error)`` when the
        night is as configured; else ``1 + line_time_error`` times the line
        time matching the true drift, or the camera's set line time); a
        :class:`WanderingTDIModel` if the image wanders.
    dt_nominal : float
        The line time the config implies, written to the headers (LINETIME),
        seconds.
    """
    import astropy.units as u
    from astropy.time import Time

    from pipeline.geometry.tdi import TDIModel

    start = Time(options.start, format="isot", scale="utc")
    n_rows = options.n_blocks * options.block_rows
    focal = resolve_focal_length(site, camera)
    rough_dt = camera.pixel_size * 1e-6 / focal / (7.2921e-5 * np.cos(np.radians(site.latitude)))
    dt_guess = camera.line_time or rough_dt
    duration = n_rows * dt_guess * (1.0 + abs(options.line_time_error)) * 1.001
    model = TDIModel(site, camera, start, duration)
    nominal = model.line_time
    actual = options.actual
    if not actual.active:
        if options.line_time_error:
            model = TDIModel(
                site, camera, start, duration, line_time=nominal * (1.0 + options.line_time_error)
            )
        return model, nominal
    # The night as it really was: the true camera, row 0 read clock_offset
    # seconds before the headers say, clocked (1 + line_time_error) times the
    # line time matching the true drift (or the camera's set line time).
    camera = true_camera(site, camera, actual)
    start = start - actual.clock_offset * u.s
    duration = duration / min(actual.focal_length_scale, 1.0)
    dt_true = TDIModel(site, camera, start, duration).line_time * (1.0 + options.line_time_error)
    if actual.wander.active:
        model = WanderingTDIModel(
            site, camera, start, duration, line_time=dt_true, wander=actual.wander
        )
    else:
        model = TDIModel(site, camera, start, duration, line_time=dt_true)
    return model, nominal


# ----------------------------------------------------------------------------
# The night


def _margins(site, camera, options, model, psf) -> tuple[float, float]:
    """Pixels beyond the chip's sides, and rows beyond the night's ends, that stars reach."""
    n_tdi, n_cols = camera.tdi_rows, camera.n_columns
    zp = options.sky.zero_point
    radius_max = float(psf.radius(10.0 ** (-0.4 * (options.stars.mag_bright - zp)) * 1e3)[0])
    margin = radius_max + 4.0
    if options.actual.wander.active:
        wander = options.actual.wander
        margin += max(wander.along_amplitude, wander.across_amplitude) / model.pixel_scale
    smear = n_tdi * (n_cols / 2.0 + margin) * model.pixel_angle
    smear *= abs(np.tan(np.radians(site.latitude))) + abs(options.line_time_error) * 2
    margin_rows = margin + smear + n_tdi * abs(options.line_time_error)
    return margin, margin_rows


def _draw_field(camera, options, model, margin, margin_rows, pad=0.0) -> Table:
    """The night's star field (synthetic and catalogue stars), ``pad`` degrees wider."""
    from astropy.table import vstack

    n_tdi, dt = camera.tdi_rows, model.line_time
    n_rows = options.n_blocks * options.block_rows
    ra_range, dec_range = field_bounds(
        model,
        camera,
        (-margin_rows - n_tdi / 2.0) * dt,
        (n_rows + margin_rows - n_tdi / 2.0) * dt,
        margin,
    )
    if pad:
        cos_dec = np.cos(np.radians(max(abs(d) for d in dec_range)))
        ra_range = (ra_range[0] - pad / cos_dec, ra_range[1] + pad / cos_dec)
        dec_range = (dec_range[0] - pad, dec_range[1] + pad)
    stars = draw_star_field(
        ra_range, dec_range, options.stars, np.random.default_rng([options.seed, 1])
    )
    if options.stars.catalog != "none":
        stars = vstack([stars, catalog_stars(options.stars.catalog, ra_range, dec_range, options)])
    return stars


def _psf_pixels(options: PSFOptions, pixel_scale: float) -> GaussianMixturePSF:
    fwhm = options.fwhm / pixel_scale
    if options.model == "gaussian":
        return GaussianMixturePSF.gaussian(fwhm)
    return GaussianMixturePSF.moffat(fwhm, options.beta, options.n_components)


def simulate_night(
    site: Site,
    camera: Camera,
    options: SimulationOptions,
    *,
    extra_stars: Table | None = None,
    star_field: Table | None = None,
    night_index: int = 0,
) -> SimulatedNight:
    """Simulate a night of raw TDI blocks with known truth, in memory.

    Parameters
    ----------
    site : Site
        The observing site.
    camera : Camera
        The TDI camera (``n_columns`` image columns; ``tdi_rows`` rows per packet).
    options : SimulationOptions
        The ``simulate:`` config section.
    extra_stars : astropy.table.Table, optional
        Stars to add to the field: ``ra``, ``dec`` (deg, ICRS at the reference
        epoch ``options.reference.epoch``) and ``mag``; optional ``pmra``,
        ``pmdec`` (mas/yr, default 0) and ``colour`` (mag, default
        ``stars.colour_mean``).  Their truth rows have ``source = 'extra'``.
    star_field : astropy.table.Table, optional
        The star field to use instead of drawing one (as :func:`simulate_nights`
        shares one among nights): ``ra``, ``dec``, ``pmra``, ``pmdec``,
        ``mag``, ``colour``, ``source`` and ``id`` (kept as the truth's ``id``).
    night_index : int, optional
        The night's number in a series: its noise, cosmic rays and bias wave
        are drawn from streams of their own; the camera (flat, dark, bad
        columns) stays the same.

    Returns
    -------
    SimulatedNight
        ``blocks``: (header, data) per written block, data of shape
        ``(block_rows, n_columns + overscan_columns)``, axis 0 the scan axis.
        ``truth``: one row per star whose image touches the night, with
        ``id``, ``source``, ``ra``, ``dec`` (deg, ICRS at the observation
        epoch ``meta['obs_epoch']``), ``pmra``, ``pmdec`` (mas/yr), ``mag``,
        ``colour``, ``flux`` (e- over the full crossing at unit transparency
        and response), ``flux_recorded`` (e- actually deposited: transparency,
        start ramp and column response applied), ``r_mean``, ``c_mean``
        (light-weighted recorded centroid, strip pixels), ``r_geom``,
        ``c_geom`` (time-mean of the track, :meth:`TDIModel.recorded_centroid`),
        ``c_file`` (column in the written files), ``t_mid`` (s since start),
        ``block``, ``in_night`` (centroid inside the night's rows and columns;
        stars just outside are kept because their light spills in),
        ``in_missing_block``, ``partial`` (start ramp cut the
        exposure), ``saturated`` (approximate: static-star peak above the full
        well).  ``reference``: see :class:`ReferenceOptions`.
    """
    import astropy.units as u
    from astropy.table import vstack
    from astropy.time import Time

    from pipeline.geometry.propermotion import positions_at_epoch

    if not isinstance(options, SimulationOptions):
        raise TypeError(
            f"options must be a SimulationOptions; got {type(options).__name__} "
            "(build it with SimulationOptions(**mapping))."
        )
    if options.nights:
        raise ValueError(
            f"simulate.nights lists {len(options.nights)} more night(s): simulate them all with "
            "simulate_nights() or `python -m pipeline.simulate CONFIG`."
        )
    bad = [b for b in options.missing_blocks if not 0 <= b < options.n_blocks]
    if bad:
        raise ValueError(
            f"missing_blocks {bad} lie outside 0..{options.n_blocks - 1}; "
            "list block numbers of this night."
        )
    timings: dict[str, float] = {}
    tic = time.perf_counter()
    model, dt_nominal = tdi_model(site, camera, options)
    header_start = Time(options.start, format="isot", scale="utc")
    dt = model.line_time
    n_tdi, n_cols = camera.tdi_rows, camera.n_columns
    n_rows = options.n_blocks * options.block_rows
    duration = n_rows * dt
    if not options.start_ramp:  # else the first rows' charge starts with the night
        _check_sky_ramp(options.sky.sky_ramp, duration, n_tdi * dt)
    psf = _psf_pixels(options.psf, model.pixel_scale)
    obs_time = model.start + duration / 2.0 * u.s
    timings["geometry"] = time.perf_counter() - tic

    tic = time.perf_counter()
    zp = options.sky.zero_point
    margin, margin_rows = _margins(site, camera, options, model, psf)
    if star_field is None:
        stars = _draw_field(camera, options, model, margin, margin_rows)
    else:
        stars = star_field
    if extra_stars is not None:
        extra = user_stars(extra_stars, options.stars)
        if "id" in stars.colnames:  # extras continue a shared field's ids
            extra["id"] = int(np.max(stars["id"], initial=-1)) + 1 + np.arange(len(extra))
        stars = vstack([stars, extra])
    ra_obs, dec_obs = positions_at_epoch(
        np.asarray(stars["ra"], float),
        np.asarray(stars["dec"], float),
        np.asarray(stars["pmra"], float),
        np.asarray(stars["pmdec"], float),
        options.reference.epoch,
        obs_time,
    )
    timings["field"] = time.perf_counter() - tic

    tic = time.perf_counter()
    after = -(margin_rows + 2.0) * dt
    coarse = model.track(ra_obs, dec_obs, 8, after=after)
    flux_rate = 10.0 ** (-0.4 * (np.asarray(stars["mag"], float) - zp))
    radius = psf.radius(flux_rate * model.crossing_time)
    with np.errstate(invalid="ignore"):
        inside = (
            np.isfinite(coarse.r).all(axis=1)
            & np.isfinite(coarse.c).all(axis=1)
            & (coarse.r.max(axis=1) + radius + 2 > -0.5)
            & (coarse.r.min(axis=1) - radius - 2 < n_rows - 0.5)
            & (coarse.c.max(axis=1) + radius + 2 > -0.5)
            & (coarse.c.min(axis=1) - radius - 2 < n_cols - 0.5)
        )
    stars, ra_obs, dec_obs = stars[inside], ra_obs[inside], dec_obs[inside]
    flux_rate, radius = flux_rate[inside], radius[inside]
    coarse_in = type(coarse)(*(getattr(coarse, k)[inside] for k in ("t", "u", "v", "r", "c")))
    n_needed = samples_needed(coarse_in, options.samples_per_pixel)
    tracks = sample_tracks(model, ra_obs, dec_obs, flux_rate, n_needed, after, duration, options)
    r_geom, c_geom = model.recorded_centroid(ra_obs, dec_obs, after=after)
    timings["tracks"] = time.perf_counter() - tic

    cols = column_properties(options, n_cols, dt, n_tdi)
    star_response = _star_response(options.actual.flat_error, n_cols)
    bias_phase = np.random.default_rng(
        [options.seed, 2, 1, *([night_index] if night_index else [])]
    ).uniform(0, 2 * np.pi)
    sky_rate = 10.0 ** (-0.4 * (options.sky.sky_brightness - zp)) * model.pixel_scale**2
    tic = time.perf_counter()
    sky_of_rows = functools.partial(
        sky_rows,
        dt=dt,
        n_tdi=n_tdi,
        duration=duration,
        sky_rate=sky_rate,
        sky=options.sky,
        start_ramp=options.start_ramp,
    )
    bleeds = bleed_trails(tracks, radius, psf, cols.response, sky_of_rows, n_rows, options)
    trails, trail_truth = _trails(model, psf, n_cols, duration, options)
    timings["bleed"] = time.perf_counter() - tic

    timings["render"] = timings["detector"] = 0.0
    blocks: list[tuple[fits.Header, np.ndarray]] = []
    for b in range(options.n_blocks):
        if b in options.missing_blocks:
            continue
        rng = np.random.default_rng([options.seed, 4, b, *([night_index] if night_index else [])])
        tic = time.perf_counter()
        image = np.zeros((options.block_rows, n_cols))
        for idx, r, c, w in tracks.groups:
            render_tracks(
                r,
                c,
                w,
                image.shape,
                psf,
                origin=(b * options.block_rows, 0),
                radius=radius[idx],
                row_box=1.0 if options.clocking_box else 0.0,
                out=image,
            )
        for r, c, w in trails:
            render_tracks(
                r,
                c,
                w,
                image.shape,
                psf,
                origin=(b * options.block_rows, 0),
                row_box=1.0 if options.clocking_box else 0.0,
                out=image,
            )
        if star_response is not None:
            image *= star_response[None, :]
        timings["render"] += time.perf_counter() - tic
        tic = time.perf_counter()
        rows = b * options.block_rows + np.arange(options.block_rows)
        bleed = trails_in_block(bleeds, rows[0], image.shape)
        data = _detect(image, bleed, rows, cols, bias_phase, sky_of_rows, dt, model, options, rng)
        if camera.flip_columns:
            data[:, :n_cols] = data[:, n_cols - 1 :: -1]
        if camera.flip_rows:
            data = data[::-1]
        header = _block_header(b, rows[0] * dt, dt_nominal, site, camera, header_start, options)
        blocks.append((header, data))
        timings["detector"] += time.perf_counter() - tic

    tic = time.perf_counter()
    truth = truth_table(
        stars, ra_obs, dec_obs, tracks, r_geom, c_geom, cols, psf, options, camera, star_response
    )
    truth.meta["photometry"] = photometry_record(options, dt, n_tdi, duration)
    truth.meta.update(
        {
            "start": model.start.isot,
            "obs_epoch": float(obs_time.jyear),
            "line_time_true": dt,
            "line_time_nominal": dt_nominal,
        }
    )
    actual = actual_record(model, options.start, options.actual) if options.actual.active else None
    if actual is not None:
        truth.meta["actual"] = actual
    if trail_truth:
        truth.meta["trails"] = trail_truth
    reference = reference_table(stars, truth, options, np.random.default_rng([options.seed, 3]))
    timings["tables"] = time.perf_counter() - tic
    meta = {
        "line_time_true": dt,
        "line_time_nominal": dt_nominal,
        "focal_length": model.focal_length,
        "pixel_scale": float(model.pixel_scale),
        "crossing_time": model.crossing_time,
        "psf_fwhm_px": psf.fwhm,
        "n_samples": tracks.max_samples,
        "n_stars": len(truth),
        "start": model.start.isot,
        "obs_epoch": float(obs_time.jyear),
        "hot_columns": cols.hot.tolist(),
        "dead_columns": cols.dead.tolist(),
        "options": options.model_dump(mode="json"),
        "timings": timings,
        "trails": trail_truth,
    }
    if actual is not None:
        meta["actual"] = actual
    log.info(
        "simulated %d blocks, %d stars, up to %d samples per track in %.1f s",
        len(blocks),
        len(truth),
        tracks.max_samples,
        sum(timings.values()),
    )
    return SimulatedNight(blocks=blocks, truth=truth, reference=reference, meta=meta)


#: Mean sidereal day, SI seconds (23 h 56 m 4.0905 s; from memory).
def _check_sky_ramp(ramp: float, duration: float, crossing: float) -> None:
    """Refuse a sky ramp that makes the sky negative while the first rows are exposed.

    The sky rate is ``1 + ramp * t / duration`` times the start's, also before
    the night starts: row 0's charge began collecting a crossing earlier, at
    ``t = -crossing``, where a steep ramp would make it negative (the
    detector then clips the image at 0 e-: the first rows lose their sky and
    stars).  ``ramp`` may be at most ``duration / crossing``.
    """
    limit = duration / crossing
    if ramp >= limit:
        raise ConfigError(
            f"simulate.sky.sky_ramp {ramp:g} makes the sky negative before the night starts: "
            f"the first rows' charge began collecting {crossing:.0f} s (a crossing) before "
            f"row 0 was read, and a ramp over the {duration:.0f} s night reaches zero there "
            f"for a ramp of {limit:.2f} or more. Use a gentler sky_ramp (below {limit:.2f}) or "
            "a longer night (n_blocks x block_rows)."
        )


SIDEREAL_DAY = 86164.0905


def night_options(site: Site, options: SimulationOptions, repeat: RepeatOptions):
    """The options of a later night of the same strip.

    Parameters
    ----------
    site : Site
        The site (its longitude sets the sidereal time).
    options : SimulationOptions
        The first night's options.
    repeat : RepeatOptions
        The later night.

    Returns
    -------
    SimulationOptions
        ``start`` moved by ``repeat.days`` sidereal days and adjusted to the
        first night's local apparent sidereal time (astropy/ERFA), ``psf`` and
        ``sky`` changed as ``repeat`` says, ``trails`` from ``repeat``.
    """
    import astropy.units as u
    from astropy.time import Time

    start = Time(options.start, format="isot", scale="utc")
    later = start + repeat.days * SIDEREAL_DAY * u.s
    lst0 = start.sidereal_time("apparent", longitude=site.longitude * u.deg)
    lst1 = later.sidereal_time("apparent", longitude=site.longitude * u.deg)
    lag = ((lst1 - lst0).to_value(u.hourangle) + 12.0) % 24.0 - 12.0  # hours, in (-12, 12]
    later = later - lag * 3600.0 * SIDEREAL_DAY / 86400.0 * u.s
    data = options.model_dump()
    data.update(
        start=later.utc.isot,
        psf={**data["psf"], **repeat.psf},
        sky={**data["sky"], **repeat.sky},
        trails=[t.model_dump() for t in repeat.trails],
        nights=(),
    )
    try:
        return SimulationOptions(**data)
    except ValueError as error:
        raise ValueError(
            f"simulate.nights entry of {repeat.days} day(s): {error}; fix its psf or sky."
        ) from None


def simulate_nights(site: Site, camera: Camera, options: SimulationOptions) -> list[SimulatedNight]:
    """The first night and every night of ``options.nights``, over one star field.

    The stars are drawn once, over the first night's field widened by
    ``options.nights_pad`` arcmin, 2 by default (the strip's ICRS position at
    one sidereal time moves by tens of arcseconds over a year: precession and
    annual aberration); every truth table gives each star the same ``id``.
    With ``nights_pad: 0`` the field is the one the first night draws alone,
    so its blocks are those of :func:`simulate_night` (nights a few days
    apart move by arcseconds, within the field's PSF margin).

    Returns
    -------
    list of SimulatedNight
        The first night, then the others in the order listed.
    """
    first = options.model_copy(update={"nights": ()})
    model, _ = tdi_model(site, camera, first)
    psf = _psf_pixels(first.psf, model.pixel_scale)
    margin, margin_rows = _margins(site, camera, first, model, psf)
    field = _draw_field(camera, first, model, margin, margin_rows, pad=first.nights_pad / 60.0)
    field["id"] = np.arange(len(field), dtype=np.int64)
    nights = [simulate_night(site, camera, first, star_field=field)]
    for k, repeat in enumerate(options.nights, start=1):
        later = night_options(site, first, repeat)
        nights.append(simulate_night(site, camera, later, star_field=field, night_index=k))
    return nights


def _star_response(flat_error, n_columns: int) -> np.ndarray | None:
    """Factor on star light per image column from ``actual.flat_error`` (None: no error)."""
    if not flat_error.active:
        return None
    if flat_error.first_column + flat_error.columns > n_columns:
        raise ValueError(
            f"simulate.actual.flat_error covers columns {flat_error.first_column} to "
            f"{flat_error.first_column + flat_error.columns - 1}, beyond the camera's "
            f"{n_columns} image columns; lower first_column or columns."
        )
    return flat_error.star_response(n_columns)


def photometry_record(options: SimulationOptions, line_time: float, tdi_rows: int, duration):
    """The night's photometric truth, for its truth table's meta (``photometry``).

    Returns
    -------
    dict
        ``zero_point`` (mag giving 1 e-/s at unit transparency), ``colour_term``
        (``reference.colour_term``: reference mag minus passband mag per mag of
        colour), ``crossing_time`` (s, ``tdi_rows * line_time``), the cloud
        (``cloud_depth``, ``cloud_centre`` s after night row 0 was read,
        ``cloud_width`` s) and the flat-field error (``flat_error_columns``,
        image columns, and ``flat_error``, fraction of star light lost).
        :func:`true_zero_point` turns it into the zero point along the night.
    """
    sky, flat = options.sky, options.actual.flat_error
    band = range(flat.first_column, flat.first_column + flat.columns) if flat.active else ()
    return {
        "zero_point": sky.zero_point,
        "colour_term": options.reference.colour_term,
        "crossing_time": tdi_rows * line_time,
        "cloud_depth": sky.cloud_depth,
        "cloud_centre": sky.cloud_time * duration,
        "cloud_width": sky.cloud_width,
        "flat_error_columns": list(band),
        "flat_error": flat.error if flat.active else 0.0,
    }


def true_zero_point(t: np.ndarray, photometry: dict) -> np.ndarray:
    """The true zero point of a star crossing the chip with mid-time ``t``, mag.

    ``photometry`` is a truth table's ``meta['photometry']``.  A star's
    electrons over its crossing are its rate at the zero point times the
    transparency integrated over the crossing (:func:`mean_transparency`), so
    its zero point (mag giving 1 e-/s over the crossing) is ``zero_point +
    2.5 log10(mean transparency)``; the detector's column response is not
    included (the calibrated images are divided by the flat).
    """
    return photometry["zero_point"] + 2.5 * np.log10(
        mean_transparency(
            t,
            photometry["crossing_time"],
            depth=photometry["cloud_depth"],
            centre=photometry["cloud_centre"],
            width=photometry["cloud_width"],
        )
    )


def _trails(model, psf, n_columns, duration, options):
    """Rendered samples ``[(r, c, w), ...]`` and truth records of the night's trails."""
    samples, records = [], []
    for trail in options.trails:
        flux_rate = 10.0 ** (-0.4 * (trail.mag - options.sky.zero_point))
        r, c, t, w, record = trail_samples(trail, model, n_columns, 3.0 * psf.fwhm, flux_rate)
        w = w * transparency(t, duration, options.sky)
        if options.start_ramp:
            w = w * (t >= 0.0)
        if r.size:
            samples.append((r, c, w))
        records.append(record)
    return samples, records


def _detect(image, bleed, rows, cols, bias_phase, sky_of_rows, dt, model, options, rng):
    """Turn a block's expected star electrons into raw ADU with the detector's effects.

    ``bleed`` holds the precomputed bleed trails of saturated stars (electrons
    after the column response), added before the noise.
    """
    det = options.detector
    n_tdi = model.n_rows
    duration = options.n_blocks * options.block_rows * dt
    sky = sky_of_rows(rows)
    frac = exposure_fraction(rows, n_tdi, options.start_ramp)
    image += sky[:, None]
    image *= cols.response[None, :]
    image += bleed
    np.maximum(image, 0.0, out=image)  # overlapping trails of a sky above full well
    image += cols.dark[None, :] * frac[:, None]
    electrons = rng.poisson(image).astype(float) if options.noise else image
    n_cols = image.shape[1]
    area_cm2 = n_cols * n_tdi * (model.camera.pixel_size * 1e-4) ** 2
    expected_hits = det.cosmic_rate * area_cm2 * len(rows) * dt * float(frac.mean())
    n_hits = int(rng.poisson(expected_hits))
    hr, hc, he = cosmic_ray_hits(image.shape, n_hits, rng, mean_electrons=det.cosmic_electrons)
    np.add.at(electrons, (hr, hc), he)
    bleed_along_columns(electrons, det.full_well)
    n_os = options.overscan_columns
    overscan = np.zeros((len(rows), n_os))
    if options.noise and det.read_noise > 0:
        electrons += det.read_noise * rng.standard_normal(electrons.shape)
        overscan += det.read_noise * rng.standard_normal(overscan.shape)
    t_read = rows * dt
    bias = (
        det.bias_level
        + det.bias_drift * t_read / duration
        + det.bias_wave * np.sin(2.0 * np.pi * t_read / det.bias_wave_period + bias_phase)
    )
    adu = np.empty((len(rows), n_cols + n_os))
    adu[:, :n_cols] = electrons / det.gain + bias[:, None] + cols.bias_pattern[None, :]
    adu[:, n_cols:] = overscan / det.gain + bias[:, None]
    if options.data_type == "uint16":
        return digitise(adu, 0.0, 1.0, det.saturate_adu, np.uint16)
    return np.minimum(adu, det.saturate_adu).astype(np.float32)


def _block_header(b, t_start, dt_nominal, site, camera, start, options) -> fits.Header:
    """FITS header of block ``b`` following the raw data contract (DEVELOPERS.md).

    ``start`` is the time the headers give row 0 of block 0 (the true time plus
    ``actual.clock_offset``); ``camera`` is the camera the config describes.
    """
    import astropy.units as u
    from astropy.io import fits

    det = options.detector
    n_rows, n_cols, n_os = options.block_rows, camera.n_columns, options.overscan_columns
    date = (start + t_start * u.s).utc
    h = fits.Header()
    h["DATE-OBS"] = (date.isot, "UTC when row 0 of this block was read out")
    h["TIMESYS"] = ("UTC", "time scale of DATE-OBS")
    h["MJD-OBS"] = (date.mjd, "DATE-OBS as MJD (UTC)")
    h["LINETIME"] = (dt_nominal, "[s] time between row shifts")
    h["TDIROWS"] = (camera.tdi_rows, "detector rows crossed by each charge packet")
    h["EXPTIME"] = (camera.tdi_rows * dt_nominal, "[s] effective exposure TDIROWS*LINETIME")
    h["BLOCKSEQ"] = (b, "block number within the night")
    h["DATASEC"] = (f"[1:{n_cols},1:{n_rows}]", "image columns")
    if n_os:
        h["BIASSEC"] = (f"[{n_cols + 1}:{n_cols + n_os},1:{n_rows}]", "serial overscan")
    h["GAIN"] = (det.gain, "[e-/adu]")
    h["RDNOISE"] = (det.read_noise, "[e-] read noise")
    h["SATURATE"] = (det.saturate_adu, "[adu] highest valid value")
    h["SITELAT"] = (site.latitude, "[deg] geodetic latitude, north +")
    h["SITELONG"] = (site.longitude, "[deg] longitude, east +")
    h["SITEELEV"] = (site.height, "[m] height")
    h["FILTER"] = (options.filter, "passband")
    h["OBJECT"] = options.object
    h["TELESCOP"] = camera.telescope if options.telescope is None else options.telescope
    h["INSTRUME"] = camera.name
    h["OBSERVAT"] = site.name
    h["BUNIT"] = "adu"
    h["PIXSIZE"] = (camera.pixel_size, "[um] pixel pitch")
    h["ORIGIN"] = ("zdrift simulate", "synthetic data with known truth")
    h["SIMULATE"] = (True, "these data are simulated")
    h["SIMSEED"] = (options.seed, "random seed of the simulation")
    return h


# ----------------------------------------------------------------------------
# Files (the edge)


def write_night(night: SimulatedNight, out_dir: str | Path) -> list[Path]:
    """Write a simulated night: FITS blocks, ``truth.ecsv`` and ``reference.ecsv``.

    Files are byte-reproducible: gzip members carry no time stamp or name.

    Parameters
    ----------
    night : SimulatedNight
        Output of :func:`simulate_night`.
    out_dir : str or Path
        Folder to write to (created if needed).

    Returns
    -------
    list of Path
        The files written, blocks first.
    """
    from astropy.io import fits

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    opts = night.meta.get("options", {})
    prefix = opts.get("file_prefix", "block_")
    compress = opts.get("compress", True)
    written = []
    for header, data in night.blocks:
        buffer = io.BytesIO()
        fits.PrimaryHDU(data=data, header=header).writeto(buffer)
        name = f"{prefix}{header['BLOCKSEQ']:04d}.fits"
        payload = buffer.getvalue()
        if compress:
            name += ".gz"
            payload = gzip.compress(payload, compresslevel=9, mtime=0)
        path = out / name
        path.write_bytes(payload)
        written.append(path)
    for name, table in (("truth.ecsv", night.truth), ("reference.ecsv", night.reference)):
        path = out / name
        table.write(path, format="ascii.ecsv", overwrite=True)
        written.append(path)
    log.info("wrote %d files to %s", len(written), out)
    return written


def load_simulation_config(path: str | Path) -> tuple[Site, Camera, SimulationOptions, Path]:
    """Read ``site``, ``camera`` and ``simulate`` from a night's YAML config.

    The file is read by :func:`pipeline.config.load_config` (``extends``,
    strict keys, errors with file and line), as ``zdrift simulate`` reads it.

    Returns
    -------
    site : Site
    camera : Camera
    options : SimulationOptions
    raw_dir : pathlib.Path
        The ``night.raw_dir`` folder, resolved against the file's folder.

    Raises
    ------
    pipeline.exceptions.ConfigError
        If the file is invalid or has no ``simulate`` section.
    """
    config = load_config(path)
    options = config.section("simulate")
    if options is None:
        raise ConfigError(
            f"{path}: no 'simulate' section; add one (see configs/simulate_demo.yaml)."
        )
    return config.site(), config.camera(), options, Path(config.night.raw_dir).resolve()


def main(argv: list[str] | None = None) -> int:
    """``python -m pipeline.simulate CONFIG [--output DIR]``; returns an exit code."""

    parser = argparse.ArgumentParser(
        prog="python -m pipeline.simulate", description="Simulate a night of raw TDI blocks."
    )
    parser.add_argument("config", help="YAML file with site, camera and simulate sections")
    parser.add_argument("--output", help="folder to write (default: the config's night.raw_dir)")
    args = parser.parse_args(argv)
    site, camera, options, raw_dir = load_simulation_config(args.config)
    out = Path(args.output) if args.output else raw_dir
    with astropy_offline():  # for this call only: astropy never downloads
        written = simulate_to_folders(site, camera, options, out)
    for night, folder, paths in written:
        print(f"wrote {len(paths)} files to {folder}")
        for key, value in night.meta["timings"].items():
            print(f"  {key:10s} {value:7.2f} s")
    return 0


def simulate_to_folders(
    site: Site, camera: Camera, options: SimulationOptions, out: str | Path
) -> list[tuple[SimulatedNight, Path, list[Path]]]:
    """Simulate the night (and every night of ``options.nights``) and write them.

    One night goes to ``out``; several go to one folder per night below it,
    named by the night's UTC start date.

    Returns
    -------
    list of (SimulatedNight, Path, list of Path)
        Each night, its folder and the files written there.
    """
    out = Path(out)
    if options.nights:
        nights = simulate_nights(site, camera, options)
    else:
        nights = [simulate_night(site, camera, options)]
    written = []
    for night in nights:
        folder = out / night.meta["start"][:10] if len(nights) > 1 else out
        written.append((night, folder, write_night(night, folder)))
    return written
