"""Options of the nightly report: the config's ``report`` section."""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict, Field

__all__ = ["ReportOptions"]


class ReportOptions(BaseModel):
    """How the nightly report is drawn (config section ``report``).

    Parameters
    ----------
    nominal_zero_point : float
        Magnitude of a source giving 1 electron per second in the rectified
        images, mag.  Used for the sky brightness until the night's zero point
        is solved; the page labels every value made with it as nominal.
    sky_bins_per_stretch : int
        Bins along the scan in which the sky level of each rectified stretch
        is measured.
    quicklook_width : int
        Largest width of the quick-look image of the strip, pixels; the strip
        is block-averaged by the smallest whole factor that fits it.
    time_bin_minutes : float
        Width of the time bins of the source counts, minutes.
    dpi : int
        Resolution of the figures, dots per inch.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    nominal_zero_point: float = Field(25.0, description="mag for 1 e-/s (nominal)")
    sky_bins_per_stretch: int = Field(8, ge=1)
    quicklook_width: int = Field(1600, ge=16)
    time_bin_minutes: float = Field(1.0, gt=0)
    dpi: int = Field(90, ge=30, le=300)
