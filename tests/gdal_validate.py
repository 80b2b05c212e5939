"""Run GDAL's own conformance checkers on files: ``python3 gdal_validate.py FILE...``.

GeoPackages go through ``osgeo_utils.samples.validate_gpkg`` (every
requirement of OGC 12-128r18 it knows, the extra checks on, warnings counted
as errors); GeoTIFFs through ``osgeo_utils.samples.validate_cloud_optimized_geotiff``
(tiled, overviews, the cloud-optimised layout; warnings counted as errors).
Prints one JSON object: file -> list of problems (empty when the file passes).

Run by Debian's ``/usr/bin/python3`` (GDAL's Python bindings, python3-gdal),
whichever Python the tests run on, so files written with rasterio and pyogrio
are checked by another GDAL build than the one that wrote them.
"""

import json
import sys


def problems(path: str) -> list:
    from osgeo import gdal

    if path.lower().endswith((".tif", ".tiff")):
        from osgeo_utils.samples import validate_cloud_optimized_geotiff as cog

        gdal.UseExceptions()
        try:
            warnings, errors, _details = cog.validate(path, check_tiled=True, full_check=True)
        except cog.ValidateCloudOptimizedGeoTIFFException as exc:
            return [str(exc)]
        return [f"error: {e}" for e in errors] + [f"warning: {w}" for w in warnings]
    from osgeo_utils.samples import validate_gpkg

    try:
        errors = validate_gpkg.check(
            path, abort_at_first_error=False, extra_checks=True, warning_msg=False, warning_as_error=True
        )
    except validate_gpkg.GPKGCheckException as exc:
        return [str(exc)]
    return [f"Req {req}: {msg}" if req else str(msg) for req, msg in errors]


if __name__ == "__main__":
    print(json.dumps({p: problems(p) for p in sys.argv[1:]}))
