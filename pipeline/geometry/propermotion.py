"""Propagate catalogue positions to the epoch of observation (proper motion)."""

from __future__ import annotations

import warnings
from typing import TYPE_CHECKING

import erfa
import numpy as np
from numpy.typing import ArrayLike

if TYPE_CHECKING:
    from astropy.time import Time

__all__ = ["positions_at_epoch"]

_MAS = np.pi / 648000.0e3
_JULIAN_YEAR_DAYS = 365.25


def _as_time(value: Time | ArrayLike, name: str) -> Time:
    from astropy.time import Time

    if isinstance(value, Time):
        return value
    try:
        return Time(np.asarray(value, dtype=float), format="jyear", scale="tcb")
    except (TypeError, ValueError) as exc:
        raise TypeError(
            f"{name} must be an astropy Time or a Julian year such as 2016.0; got {value!r}."
        ) from exc


def positions_at_epoch(
    ra: ArrayLike,
    dec: ArrayLike,
    pmra_masyr: ArrayLike,
    pmdec_masyr: ArrayLike,
    epoch: Time | ArrayLike,
    obstime: Time | ArrayLike,
    *,
    parallax_mas: ArrayLike | None = None,
    radial_velocity_kms: ArrayLike | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """ICRS positions moved along their proper motion from ``epoch`` to ``obstime``.

    Linear space motion on the tangent plane, renormalised to the sphere:
    ``s(t) = normalise(s0 + dt * (pmra * e_ra + pmdec * e_dec))``.  This is
    the rigorous motion for a star at large distance with zero radial
    velocity (what ERFA ``pmsafe`` does without a parallax); it ignores
    perspective acceleration, which is below 0.1 mas over 30 years except for
    a handful of very nearby fast stars (Barnard's star: ~1 mas/yr^2).
    Stars given a positive ``parallax_mas`` are moved instead by ERFA
    ``pmsafe`` (rigorous space motion, including perspective acceleration
    when ``radial_velocity_kms`` is given).

    Parameters
    ----------
    ra, dec : array_like
        ICRS coordinates at ``epoch``, degrees.
    pmra_masyr, pmdec_masyr : array_like
        Proper motion in mas/yr; ``pmra`` includes the ``cos(dec)`` factor
        (as in Hipparcos and Gaia).  NaN is taken as zero.
    epoch : `~astropy.time.Time` or array_like
        Catalogue epoch; a number is a Julian year in TCB (Gaia DR3: 2016.0,
        Hipparcos: 1991.25).
    obstime : `~astropy.time.Time` or array_like
        Epoch of observation (a number is a Julian year).
    parallax_mas : array_like or None, optional
        Parallax in mas.  Where it is finite and positive the star is moved by
        ERFA ``pmsafe``; elsewhere (and for ``None``) by the formula above.
    radial_velocity_kms : array_like or None, optional
        Radial velocity in km/s (positive receding), used with the parallax;
        NaN or ``None`` is taken as zero.

    Returns
    -------
    ra, dec : ndarray
        Degrees at ``obstime``, RA in [0, 360); broadcast shape of the inputs.
    """
    epoch_t = _as_time(epoch, "epoch")
    obs_t = _as_time(obstime, "obstime")
    years = (obs_t.tcb.jd1 - epoch_t.tcb.jd1 + (obs_t.tcb.jd2 - epoch_t.tcb.jd2)) / (
        _JULIAN_YEAR_DAYS
    )
    a = np.radians(np.asarray(ra, dtype=float))
    d = np.radians(np.asarray(dec, dtype=float))
    mua = np.nan_to_num(np.asarray(pmra_masyr, dtype=float)) * _MAS * years
    mud = np.nan_to_num(np.asarray(pmdec_masyr, dtype=float)) * _MAS * years
    ca, sa, cd, sd = np.cos(a), np.sin(a), np.cos(d), np.sin(d)
    x = cd * ca - mua * sa - mud * sd * ca
    y = cd * sa + mua * ca - mud * sd * sa
    z = sd + mud * cd
    ra_out = np.degrees(np.arctan2(y, x)) % 360.0
    dec_out = np.degrees(np.arctan2(z, np.hypot(x, y)))
    if parallax_mas is None:
        return ra_out, dec_out
    return _space_motion(
        (ra_out, dec_out),
        (a, d),
        (mua, mud),
        parallax_mas,
        radial_velocity_kms,
        years,
        epoch_t,
        obs_t,
    )


def _space_motion(linear, start, motion, parallax_mas, radial_velocity_kms, years, epoch_t, obs_t):
    """``linear`` positions, replaced by ERFA ``pmsafe`` where the parallax is positive."""
    plx = np.asarray(parallax_mas, dtype=float)
    rv = np.nan_to_num(
        np.asarray(0.0 if radial_velocity_kms is None else radial_velocity_kms, float)
    )
    e0, e1 = epoch_t.tdb, obs_t.tdb
    arrays = np.broadcast_arrays(
        *linear, *start, *motion, plx, rv, years, e0.jd1, e0.jd2, e1.jd1, e1.jd2
    )
    ra_out, dec_out, a, d, mua, mud, plx, rv, years, *epochs = (np.array(v) for v in arrays)
    use = np.isfinite(plx) & (plx > 0)
    if use.any():
        # mua, mud are the motions over ``years`` in radians; ERFA wants rates per
        # Julian year with dRA/dt not multiplied by cos(dec).
        span = np.where(years[use] != 0.0, years[use], 1.0)
        with warnings.catch_warnings():
            # pmsafe moves a star whose tiny parallax implies more than ~0.1c to a
            # nearer distance and says so (status 1): the intended outcome for a
            # noisy catalogue parallax, not a problem to report.
            warnings.filterwarnings("ignore", 'ERFA function "pmsafe"', erfa.ErfaWarning)
            ra2, dec2, *_ = erfa.pmsafe(
                a[use],
                d[use],
                mua[use] / span / np.cos(d[use]),
                mud[use] / span,
                plx[use] / 1000.0,
                rv[use],
                *(e[use] for e in epochs),
            )
        ra_out[use] = np.degrees(ra2) % 360.0
        dec_out[use] = np.degrees(dec2)
    return ra_out, dec_out
