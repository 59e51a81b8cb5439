"""Land-cover classes of the demo scene, their surface reflectance and the band layout."""

from __future__ import annotations

__all__ = [
    "BANDS",
    "CODE",
    "GUIDE_BAND",
    "LANDCOVER",
    "NODATA",
    "PAN_WEIGHTS",
    "REFLECTANCE_SCALE",
    "SPECTRA",
    "VEGETATION",
    "WATER",
    "codes",
]

#: Band names, in file order.
BANDS = ("blue", "green", "red", "nir")

#: Name of the panchromatic-like guide band.
GUIDE_BAND = "pan"

#: Weights of blue, green, red and NIR in the panchromatic-like guide band.
#: Our own choice, not any sensor's response: a panchromatic detector spans
#: the visible and the near-infrared (roughly 450-900 nm), so its reading
#: follows every band without equalling any one. Its response is low in the
#: blue (silicon detectors are least sensitive there and haze is usually
#: filtered out), flat over the green and the red, and reaches into the NIR
#: through the red edge, where vegetation is bright. They sum to 1, so the
#: band is a reflectance like the others.
PAN_WEIGHTS = (0.15, 0.30, 0.35, 0.20)

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
