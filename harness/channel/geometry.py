"""Great-circle geometry of a forward-scatter path, on a spherical Earth.

The reflection point sits at height h above the path midpoint; the
forward-scatter half-angle phi is the angle between each ray and the local
vertical there, and the elevation is the ray's angle above each station's
horizon.  A spherical Earth of mean radius 6371 km is within 0.5 % of the
ellipsoid for the distances here (tests compare with geographiclib).
"""

from __future__ import annotations

import dataclasses
import math

EARTH_RADIUS_KM = 6371.0
"""Mean Earth radius (IUGG), km."""


def central_angle(lat1: float, lon1: float, lat2: float, lon2: float) -> float:
    """Angle subtended at the Earth's centre, radians (haversine formula)."""
    p1, p2 = math.radians(lat1), math.radians(lat2)
    dp, dl = p2 - p1, math.radians(lon2 - lon1)
    a = math.sin(dp / 2) ** 2 + math.cos(p1) * math.cos(p2) * math.sin(dl / 2) ** 2
    return 2 * math.asin(min(1.0, math.sqrt(a)))


def midpoint(lat1: float, lon1: float, lat2: float, lon2: float) -> tuple[float, float]:
    """Great-circle midpoint, degrees."""
    p1, p2, l1 = math.radians(lat1), math.radians(lat2), math.radians(lon1)
    dl = math.radians(lon2 - lon1)
    bx, by = math.cos(p2) * math.cos(dl), math.cos(p2) * math.sin(dl)
    lat = math.atan2(math.sin(p1) + math.sin(p2), math.hypot(math.cos(p1) + bx, by))
    lon = l1 + math.atan2(by, math.cos(p1) + bx)
    return math.degrees(lat), (math.degrees(lon) + 540.0) % 360.0 - 180.0


def max_single_hop_km(height_km: float) -> float:
    """Longest path whose midpoint reflection is on both horizons: 2 R acos(R / (R + h))."""
    return 2 * EARTH_RADIUS_KM * math.acos(EARTH_RADIUS_KM / (EARTH_RADIUS_KM + height_km))


@dataclasses.dataclass(frozen=True)
class PathGeometry:
    distance_km: float
    midpoint: tuple[float, float]
    height_km: float
    half_angle_deg: float
    elevation_deg: float
    range_km: float
    """Station to reflection point (the same from both ends at the midpoint)."""

    @property
    def sec2_phi(self) -> float:
        return 1.0 / math.cos(math.radians(self.half_angle_deg)) ** 2


def reflection_geometry(distance_km: float, height_km: float) -> tuple[float, float, float]:
    """(half-angle phi, elevation, slant range) for a midpoint reflection, degrees and km."""
    half = distance_km / EARTH_RADIUS_KM / 2
    top = EARTH_RADIUS_KM + height_km
    across = top * math.sin(half)
    up = top * math.cos(half) - EARTH_RADIUS_KM
    elevation = math.atan2(up, across)
    phi = math.pi / 2 - elevation - half
    return math.degrees(phi), math.degrees(elevation), math.hypot(across, up)


class PathError(ValueError):
    """A path this model cannot serve."""


def path_geometry(lat1: float, lon1: float, lat2: float, lon2: float, height_km: float) -> PathGeometry:
    """Geometry of the path between two stations; refuses a path beyond one hop."""
    distance = EARTH_RADIUS_KM * central_angle(lat1, lon1, lat2, lon2)
    limit = max_single_hop_km(height_km)
    if distance >= limit:
        raise PathError(
            f"path of {distance:.0f} km is beyond the single-hop limit of {limit:.0f} km for trails at "
            f"{height_km:g} km: the reflection point would be below both horizons; use a relay or a shorter path"
        )
    if distance < 1.0:
        raise PathError(f"the two stations are {distance * 1000:.0f} m apart: give two distinct sites")
    phi, elevation, slant = reflection_geometry(distance, height_km)
    return PathGeometry(distance, midpoint(lat1, lon1, lat2, lon2), height_km, phi, elevation, slant)


SHORT_PATH_KM = 400.0
"""Below about 400-500 km ordinary antennas see few usable trails (common practice, no source)."""
