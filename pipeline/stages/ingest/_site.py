"""The raw headers' site keywords (SITELAT, SITELONG, SITEELEV) against the config.

The config's site is the one the geometry uses; a raw block may also name
its site.  Where it does and the two disagree by more than header rounding
can explain, either the config belongs to another station or the camera's
clock computer is set up wrong: ingest reports it (a problem, exit status 1)
and goes on with the config's site.
"""

from __future__ import annotations

from collections.abc import Sequence

from pipeline.stages.ingest._header import BlockInfo

__all__ = ["ANGLE_TOLERANCE", "HEIGHT_TOLERANCE", "compare_site"]

#: Largest latitude or longitude difference (deg) that is not a mismatch.
#: Headers often round the site to 0.01 deg (a rounding error of up to
#: 0.005 deg); 0.01 deg allows twice that and still catches another station,
#: a longitude of the wrong sign or in the wrong range, or a swapped pair.
#: 0.01 deg is ~1.1 km on the ground (common practice: 1 deg of latitude is
#: ~111 km), i.e. ~36 arcsec in the direction of the zenith.
ANGLE_TOLERANCE = 0.01
#: Largest height difference (m) that is not a mismatch.  The config's height
#: is above the WGS84 ellipsoid; a header may give it above sea level, which
#: differs by the geoid undulation, within about +-110 m worldwide (from
#: memory); 150 m allows that plus rounding.  Height barely enters the
#: geometry (gravity changes by ~3e-7 per metre).
HEIGHT_TOLERANCE = 150.0


def _longitude_difference(a: float, b: float) -> float:
    """Smallest angle between two longitudes, degrees (so -1 and 359 agree)."""
    return abs((a - b + 180.0) % 360.0 - 180.0)


def compare_site(infos: Sequence[BlockInfo], site) -> list[str]:
    """Problem lines for blocks whose header site differs from the config's.

    Parameters
    ----------
    infos : sequence of BlockInfo
        The blocks; keywords a header lacks (None) are not compared.
    site : pipeline.geometry.Site
        The config's site (``latitude``, ``longitude`` in deg, ``height`` in m).

    Returns
    -------
    list of str
        One line per distinct header site that differs (by more than
        :data:`ANGLE_TOLERANCE` or :data:`HEIGHT_TOLERANCE`), naming the blocks.
    """
    by_site: dict[tuple, list[str]] = {}
    for info in infos:
        key = (info.site_lat, info.site_long, info.site_elev)
        by_site.setdefault(key, []).append(info.name)
    problems = []
    for (latitude, longitude, height), names in by_site.items():
        differences = []
        if latitude is not None and abs(latitude - site.latitude) > ANGLE_TOLERANCE:
            differences.append(f"SITELAT={latitude:g} (config latitude {site.latitude:g} deg)")
        if (
            longitude is not None
            and _longitude_difference(longitude, site.longitude) > ANGLE_TOLERANCE
        ):
            differences.append(f"SITELONG={longitude:g} (config longitude {site.longitude:g} deg)")
        if height is not None and abs(height - site.height) > HEIGHT_TOLERANCE:
            differences.append(f"SITEELEV={height:g} (config height {site.height:g} m)")
        if differences:
            blocks = names[0] if len(names) == 1 else f"{names[0]} and {len(names) - 1} more"
            problems.append(
                f"{blocks}: header site {', '.join(differences)} differs by more than "
                f"{ANGLE_TOLERANCE:g} deg or {HEIGHT_TOLERANCE:g} m; the geometry uses the "
                "config's site: check site: in the config."
            )
    return problems
