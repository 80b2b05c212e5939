"""What every product file says about itself: the caution and where it came from.

The same items go into the GeoPackage's metadata tables, the GeoTIFF metadata,
the DXF header comment and the report, so a file that travels alone still
carries the caution, the software and version, the survey, the surface method,
the survey date, the CRS and the vertical datum of its elevations.

Dates. File formats hold a time stamp (GeoPackage ``last_change``, the TIFF
DateTime tag). It is never the clock, so that two runs give identical files:
it is ``SOURCE_DATE_EPOCH`` when that is set (the reproducible-builds
convention), else the survey's date (``[survey] date``), else
1970-01-01T00:00:00Z, a placeholder that says "no date" to anyone who knows
the convention. The provenance's ``date`` item is the survey's date or
"not stated", never the placeholder.
"""

from __future__ import annotations

import datetime as _dt
import os
from dataclasses import dataclass
from typing import Dict, List, Optional

from ..errors import OutputError

__all__ = [
    "CAUTION",
    "VERTICAL_NOT_STATED",
    "Provenance",
    "elevation_crs",
    "product_timestamp",
    "provenance",
    "vertical_label",
]

CAUTION = (
    "A seismic depth map is an interpretation with stated uncertainty. It does not replace borings: "
    "designs that rely on it must be checked against borings and signed off under local codes by "
    "licensed professionals."
)
#: How elevations are labelled when the survey names no vertical datum
VERTICAL_NOT_STATED = "vertical datum not stated"


@dataclass(frozen=True)
class Provenance:
    """Caution and origin of a run's products (all text).

    Attributes
    ----------
    software : str
        ``"Rockhead <version>"``.
    survey : str
        The survey's name.
    method : str
        How the surface was made (``kriging``, ``spline``, ``tomography``), or
        ``"no surface"``.
    date : str
        The survey's date (ISO 8601) or ``"not stated"``.
    timestamp : datetime.datetime
        The time stamp written into file formats (see the module notes), UTC.
    crs : str
        The horizontal CRS of x and y.
    vertical_datum : str
        The vertical CRS of elevations, or :data:`VERTICAL_NOT_STATED`.
    """

    software: str
    survey: str
    method: str
    date: str
    timestamp: _dt.datetime
    crs: str
    vertical_datum: str

    def items(self) -> Dict[str, str]:
        """Metadata items (GeoTIFF and GeoPackage), upper-case keys."""
        return {
            "CAUTION": CAUTION,
            "SOFTWARE": self.software,
            "SURVEY": self.survey,
            "METHOD": self.method,
            "SURVEY_DATE": self.date,
            "CRS": self.crs,
            "VERTICAL_DATUM": self.vertical_datum,
        }

    def lines(self) -> List[str]:
        """One line per item, for a text header (DXF comments)."""
        return [
            f"Made by {self.software} from the survey '{self.survey}' (surface: {self.method}; survey date: "
            f"{self.date}).",
            f"Coordinates: {self.crs}; elevations: {self.vertical_datum}.",
            f"CAUTION: {CAUTION}",
        ]


def vertical_label(vertical_crs) -> str:
    """``'EPSG:5703 (NAVD88 height)'``, or :data:`VERTICAL_NOT_STATED` for None."""
    if vertical_crs is None:
        return VERTICAL_NOT_STATED
    from ..crs import crs_label

    return crs_label(vertical_crs)


def product_timestamp(survey_date: Optional[_dt.date | str] = None) -> _dt.datetime:
    """The time stamp of the product files (see the module notes), UTC.

    Parameters
    ----------
    survey_date : datetime.date or ISO text (``"2025-06-14"``), optional
        The survey's date.
    """
    env = os.environ.get("SOURCE_DATE_EPOCH")
    if env:
        try:
            return _dt.datetime.fromtimestamp(int(env), tz=_dt.timezone.utc)
        except (ValueError, OverflowError, OSError) as exc:
            raise OutputError(f"SOURCE_DATE_EPOCH={env!r} is not a whole number of seconds since 1970") from exc
    if isinstance(survey_date, str):
        survey_date = _dt.date.fromisoformat(survey_date)
    if survey_date is not None:
        return _dt.datetime(survey_date.year, survey_date.month, survey_date.day, tzinfo=_dt.timezone.utc)
    return _dt.datetime(1970, 1, 1, tzinfo=_dt.timezone.utc)


def provenance(result) -> Provenance:
    """The :class:`Provenance` of a :class:`~rockhead.core.results.RunResult`."""
    from .. import __version__
    from ..crs import crs_label

    survey = result.survey
    handoff = survey.handoff
    return Provenance(
        software=f"Rockhead {__version__}",
        survey=str(survey.name),
        method=result.method_used or "no surface",
        date=handoff.survey_date or "not stated",
        timestamp=product_timestamp(handoff.survey_date),
        crs=crs_label(survey.crs),
        vertical_datum=vertical_label(handoff.vertical_crs),
    )


def elevation_crs(survey):
    """The CRS of elevations: the working CRS compounded with the survey's vertical CRS, when stated.

    Without a vertical datum it is the working (horizontal) CRS, and elevations
    are labelled :data:`VERTICAL_NOT_STATED`.
    """
    import pyproj

    vertical = survey.handoff.vertical_crs
    if vertical is None:
        return survey.crs
    return pyproj.CRS.from_json_dict(
        {
            "type": "CompoundCRS",
            "name": f"{survey.crs.name} + {vertical.name}",
            "components": [survey.crs.to_json_dict(), vertical.to_json_dict()],
        }
    )
