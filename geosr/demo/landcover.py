"""Land-cover classes of the demo scene, their surface reflectance and the band layout."""

from __future__ import annotations

__all__ = [
    "BANDS",
    "CODE",
    "LANDCOVER",
    "NODATA",
    "REFLECTANCE_SCALE",
    "SPECTRA",
    "VEGETATION",
    "WATER",
    "codes",
]

#: Band names, in file order.
BANDS = ("blue", "green", "red", "nir")

#: Land-cover classes of the generator.
LANDCOVER = (
    "river",
    "reservoir",
    "green-crop",
    "ripe-cereal",
    "bare-soil",
    "grass",
    "trees",
    "road",
    "track",
    "red-roof",
    "grey-roof",
    "concrete",
    "gravel",
)
#: Class name -> the value it takes in the land-cover array.
CODE = {name: i for i, name in enumerate(LANDCOVER)}

#: Classes where green vegetation dominates (NIR well above red).
VEGETATION = ("green-crop", "ripe-cereal", "grass", "trees")
#: Open water (NIR below red).
WATER = ("river", "reservoir")

#: Surface reflectance (blue, green, red, NIR) of each class. Typical values
#: for these covers as commonly plotted in remote-sensing textbooks (from
#: memory, rounded): vegetation has a red absorption and a high NIR plateau,
#: water absorbs NIR, soils rise slowly from blue to NIR.
SPECTRA = {
    "river": (0.070, 0.080, 0.060, 0.025),
    "reservoir": (0.060, 0.062, 0.036, 0.012),
    "green-crop": (0.035, 0.075, 0.040, 0.420),
    "ripe-cereal": (0.060, 0.095, 0.125, 0.290),
    "bare-soil": (0.085, 0.115, 0.160, 0.230),
    "grass": (0.040, 0.085, 0.060, 0.330),
    "trees": (0.025, 0.050, 0.030, 0.300),
    "road": (0.085, 0.095, 0.105, 0.125),
    "track": (0.110, 0.140, 0.180, 0.230),
    "red-roof": (0.070, 0.085, 0.210, 0.260),
    "grey-roof": (0.200, 0.210, 0.220, 0.240),
    "concrete": (0.170, 0.180, 0.190, 0.215),
    "gravel": (0.150, 0.180, 0.220, 0.260),
}

#: Reflectance is stored as round(reflectance * REFLECTANCE_SCALE) in uint16.
REFLECTANCE_SCALE = 10_000
NODATA = 0


def codes(*names):
    """The land-cover values of the named classes, as a list (for ``np.isin``)."""
    return [CODE[name] for name in names]
