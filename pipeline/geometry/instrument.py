"""Plain descriptions of the observing site and the TDI camera.

These immutable containers are the contract between the configuration layer
(which builds them from YAML) and the geometry, simulation and stage code
(which only reads them).  Angles are in degrees or arcseconds, lengths in the
units named in each field, as a person would write them in a config file.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["Camera", "Site"]


@dataclass(frozen=True)
class Site:
    """An observing site.

    Parameters
    ----------
    latitude : float
        Geodetic (WGS84) latitude in degrees, north positive.
    longitude : float
        Longitude in degrees, east positive.
    height : float
        Height above the WGS84 ellipsoid in metres.
    pressure : float or None
        Air pressure at the site in hPa, used for refraction.  ``0`` switches
        refraction off; ``None`` takes the standard-atmosphere pressure for
        ``height`` (common practice).
    temperature : float
        Air temperature in degrees Celsius.
    relative_humidity : float
        Relative humidity, 0 to 1.
    wavelength : float
        Effective wavelength of the passband in micrometres (refraction).
    name : str
        Free-form site name for headers (``OBSERVAT``) and reports.
    """

    latitude: float
    longitude: float
    height: float = 0.0
    pressure: float | None = None
    temperature: float = 5.0
    relative_humidity: float = 0.5
    wavelength: float = 0.6
    name: str = "unnamed site"


@dataclass(frozen=True)
class Camera:
    """A TDI camera behind a zenith-pointing mirror.

    The scan axis is the detector row axis: charge is clocked along the
    columns, from detector row 0 towards detector row ``tdi_rows`` where the
    serial register sits.

    Parameters
    ----------
    n_columns : int
        Number of image (light-sensitive) columns across the scan.
    tdi_rows : int
        Number of detector rows each charge packet crosses (integration length).
    pixel_size : float
        Pixel pitch in micrometres.
    focal_length : float or None
        Effective focal length in metres.  Give this or ``spin_period``.
    spin_period : float or None
        Rotation period of a liquid mirror in seconds (relative to the ground);
        the focal length follows from f = g / (2 w^2) with the site's normal
        gravity.
    rotation : float
        Camera rotation in degrees: angle from the local west (drift)
        direction to the detector's +row axis, counter-clockwise on the sky
        as seen looking up with north at the top (west towards north, i.e.
        from focal-plane +xi towards +eta).  0 means rows run exactly along
        the drift; a star then drifts along +row and, for a positive angle,
        towards decreasing column.  Must lie in (-90, 90).
    tilt_east, tilt_north : float
        Offset of the optical axis from the zenith, in arcseconds, towards the
        east and the north.
    distortion_k1 : float
        Radial distortion coefficient: a focal-plane radius rho (radians on the
        sky) is recorded at rho * (1 + k1 * rho**2).  Units: rad^-2.
    line_time : float or None
        Seconds between row shifts.  ``None`` means the line time that matches
        the drift at the chip centre (see ``pipeline.geometry``).
    flip_columns : bool
        If true, column index grows to the south instead of the north.
    flip_rows : bool
        If true, later rows hold smaller right ascension (scan runs the other
        way on the detector).
    name : str
        Free-form camera name (``INSTRUME`` of the products).
    telescope : str
        Free-form name of the telescope the camera sits on (``TELESCOP``).
    """

    n_columns: int
    tdi_rows: int
    pixel_size: float
    focal_length: float | None = None
    spin_period: float | None = None
    rotation: float = 0.0
    tilt_east: float = 0.0
    tilt_north: float = 0.0
    distortion_k1: float = 0.0
    line_time: float | None = None
    flip_columns: bool = False
    flip_rows: bool = False
    name: str = "unnamed camera"
    telescope: str = "unnamed telescope"

    def __post_init__(self) -> None:
        if (self.focal_length is None) == (self.spin_period is None):
            raise ValueError(
                "Camera needs exactly one of focal_length (metres) or spin_period "
                f"(seconds); got focal_length={self.focal_length!r}, "
                f"spin_period={self.spin_period!r}."
            )
        if self.n_columns < 1 or self.tdi_rows < 1:
            raise ValueError(
                f"Camera n_columns and tdi_rows must be positive; got "
                f"n_columns={self.n_columns}, tdi_rows={self.tdi_rows}."
            )
        if self.pixel_size <= 0:
            raise ValueError(
                f"Camera pixel_size must be positive micrometres; got {self.pixel_size}."
            )
