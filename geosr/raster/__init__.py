"""The raster layer: rasterio windows, profiles, transforms, masks and tags.

Knows files but no numerics: the core decides values, this layer only cuts
windows with halos, keeps the georeferencing and metadata, and writes the
output safely (temporary file beside the destination, renamed into place).
"""

from .blocks import BlockPlan, BlockResult, magnify_one_block, read_block
from .io import (
    SUPPORTED_DTYPES,
    SourceInfo,
    TempFiles,
    check_bands,
    check_destination,
    inspect_source,
    open_source,
    parse_bands,
    remove_stale_temps,
)
from .masks import MaskMode, mask_mode, nearest_magnify, to_output_dtype
from .profiles import parse_creation_options
from .stac import stac_item, stac_path
from .tags import provenance_tags
from .transforms import (
    crs_summary,
    ground_sample_distance,
    scale_gcps,
    scaled_transform,
    wgs84_bbox,
    wgs84_footprint,
)
from .windows import MIN_CHUNK, Block, block_grid, halo_read

__all__ = [
    "Block",
    "BlockPlan",
    "BlockResult",
    "MIN_CHUNK",
    "MaskMode",
    "SUPPORTED_DTYPES",
    "SourceInfo",
    "TempFiles",
    "block_grid",
    "check_bands",
    "check_destination",
    "crs_summary",
    "ground_sample_distance",
    "halo_read",
    "inspect_source",
    "magnify_one_block",
    "mask_mode",
    "nearest_magnify",
    "open_source",
    "parse_bands",
    "parse_creation_options",
    "provenance_tags",
    "read_block",
    "remove_stale_temps",
    "scale_gcps",
    "scaled_transform",
    "stac_item",
    "stac_path",
    "to_output_dtype",
    "wgs84_bbox",
    "wgs84_footprint",
]

