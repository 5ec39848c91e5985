"""Coordinate reference systems of point clouds: parsing, comparison and linear units.

A LAS file states its CRS in a WKT VLR (LAS 1.4) or in GeoTIFF keys (older files); laspy's
``LasHeader.parse_crs`` turns either into a :class:`pyproj.CRS`. This module derives from that
CRS the two numbers clearaudit needs to work in metres: the length of the horizontal unit and
the length of the vertical unit (they differ in a compound CRS such as a US-survey-foot state
plane with a metre height datum).
"""
from __future__ import annotations

import logging
from typing import Any

from ..errors import InputError
from ..units import FOOT_M, US_SURVEY_FOOT_M

logger = logging.getLogger(__name__)

#: Exact lengths of the linear units clearaudit recognises. [m]
_EXACT_UNITS_M = (1.0, FOOT_M, US_SURVEY_FOOT_M)


def parse_crs_option(value: Any, option: str = "--crs") -> Any:
    """Turn a user-given CRS (string, EPSG integer or ``pyproj.CRS``) into a ``pyproj.CRS``.

    Parameters
    ----------
    value
        Anything ``pyproj.CRS.from_user_input`` accepts ("EPSG:32617", 2264, a WKT or PROJ
        string), or ``None``.
    option
        Name of the option the value came from, used in the error message.

    Returns
    -------
    pyproj.CRS or None

    Raises
    ------
    InputError
        When pyproj cannot parse the value.
    """
    if value is None:
        return None
    import pyproj

    if isinstance(value, pyproj.CRS):
        return value
    try:
        return pyproj.CRS.from_user_input(value)
    except (pyproj.exceptions.CRSError, TypeError, ValueError) as exc:
        raise InputError(option, f"cannot parse the CRS {value!r} ({_first_line(exc)})") from exc


def exact_unit_m(factor: float) -> float:
    """Snap a unit length reported by PROJ to the exact definition when it is one of ours.

    Parameters
    ----------
    factor
        Length of one unit as reported by pyproj. [m]

    Returns
    -------
    float
        1.0, 0.3048 or 1200/3937 when ``factor`` is within 1e-9 relative of one of them,
        otherwise ``factor`` unchanged. [m]

    Notes
    -----
    International foot = 0.3048 m; US survey foot = 1200/3937 m (NIST Handbook 44, App. C).
    PROJ stores the US survey foot as 0.30480060960121924, which is the same number to the last
    bit, but other sources round it; snapping keeps round trips exact.
    """
    for exact in _EXACT_UNITS_M:
        if abs(factor - exact) <= 1e-9 * exact:
            return exact
    return float(factor)


def crs_units_m(crs: Any, source: str | None = None) -> tuple[float, float]:
    """Horizontal and vertical unit lengths of a CRS.

    Parameters
    ----------
    crs
        A ``pyproj.CRS`` (projected, compound or 3-D projected) or ``None``.
    source
        File (or option) named in the error message.

    Returns
    -------
    (horizontal_unit_m, vertical_unit_m)
        Metres per CRS unit. [m/unit]

    Raises
    ------
    InputError
        When the CRS is geographic (angular coordinates) or its axes have no linear unit.

    Notes
    -----
    With no CRS the coordinates are taken to be metres. A projected CRS without a vertical
    component is taken to carry heights in its horizontal unit — common practice (no source):
    US state-plane surveys in feet give elevations in the same feet.
    """
    if crs is None:
        return 1.0, 1.0
    axes = list(crs.axis_info)
    if crs.is_compound and len(axes) < 3:
        axes = [a for sub in crs.sub_crs_list for a in sub.axis_info]
    if not axes:
        raise InputError(source, f"the CRS {crs.name!r} has no axes with a unit")
    horizontal = axes[0]
    if crs.is_geographic or _is_angular(horizontal):
        raise InputError(
            source,
            f"the CRS {crs.name!r} is geographic (coordinates in {horizontal.unit_name}); "
            "clearaudit needs a projected CRS in metres or feet",
        )
    h = exact_unit_m(horizontal.unit_conversion_factor)
    v = h
    if len(axes) >= 3 and not _is_angular(axes[2]):
        v = exact_unit_m(axes[2].unit_conversion_factor)
    return h, v


def crs_unit_names(crs: Any) -> tuple[str, str]:
    """Names of the horizontal and vertical units ("metre", "US survey foot" ...)."""
    from ..cloud import unit_name

    if crs is None:
        return "metre (assumed, no CRS)", "metre (assumed, no CRS)"
    h, v = crs_units_m(crs)
    return unit_name(h), unit_name(v)


def same_crs(a: Any, b: Any) -> bool:
    """Whether two CRSs (or two ``None``) describe the same system."""
    if a is None or b is None:
        return a is None and b is None
    try:
        return bool(a.equals(b, ignore_axis_order=True))
    except Exception:  # pragma: no cover - very old pyproj
        return a == b


def crs_to_wkt(crs: Any) -> str:
    """WKT for a LAS 1.4 CRS record (OGC WKT 1 when expressible, WKT 2 otherwise).

    References
    ----------
    ASPRS, LAS Specification 1.4 R15 (2019), section 2.5: "OGC Coordinate System WKT Record".
    """
    try:
        wkt = crs.to_wkt("WKT1_GDAL")
        if wkt:
            return wkt
    except Exception:  # noqa: BLE001 - pyproj raises several kinds here
        pass
    return crs.to_wkt()


def crs_label(crs: Any) -> dict[str, Any]:
    """Name and EPSG code of a CRS for reports (``None`` values when unknown)."""
    if crs is None:
        return {"crs_name": None, "crs_epsg": None}
    try:
        epsg = crs.to_epsg()
    except Exception:  # noqa: BLE001
        epsg = None
    return {"crs_name": crs.name, "crs_epsg": epsg}


def _is_angular(axis: Any) -> bool:
    name = (axis.unit_name or "").lower()
    return "degree" in name or "radian" in name or "grad" in name or "arc" in name


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip() or type(exc).__name__
    return text.splitlines()[0][:200]
