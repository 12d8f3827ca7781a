"""Old module name of the raster I/O, kept so existing imports work: the names now live in
``denude.io.raster_inputs`` (opening, inspection, value ranges, codes, hashes),
``denude.io.raster_warp`` (footprints, resampling rule, warp plans, ``GridReader``) and
``denude.io.raster_outputs`` (``OutputSpec``, layouts, creation options, ``RasterWriter``).
Patch a setting (e.g. ``GDAL_THREADS``) in the module that defines it, not here.
"""

from denude.io.raster_inputs import *  # noqa: F401,F403
from denude.io.raster_inputs import _gdal_reason, _opened  # noqa: F401
from denude.io.raster_outputs import *  # noqa: F401,F403
from denude.io.raster_warp import *  # noqa: F401,F403
from denude.io.raster_warp import _dest_dtype, _dest_nodata, _mark_nodata  # noqa: F401
from denude.registry import INT32_NODATA  # noqa: F401
