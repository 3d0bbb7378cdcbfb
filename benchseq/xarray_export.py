"""A table of points as an ``xarray.Dataset`` (xarray is optional: ``benchseq[xarray]``).

One dimension, ``point_id``, in storage order as ``read_results`` gives it. The frequencies
(planned and set) and the operating point (``dc_level``, ``load_current``) are coordinates
along it, every other column a data variable. Each variable carries the file's ``units``
and its description as ``long_name``; the Dataset's attrs hold the run's metadata (text and
numbers as they are, true/false as 1/0, lists and tables as JSON text), so that a netCDF
writer would accept them.

Nothing here imports xarray until a Dataset is asked for.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd

if TYPE_CHECKING:
    import xarray

COORDINATES = ("frequency_planned", "frequency", "dc_level", "load_current")
_MISSING = (
    "the xarray export needs xarray, an optional dependency of benchseq: install it with "
    "pip install 'benchseq[xarray]' (or read the table as pandas with read_results(path))"
)


def _xarray() -> Any:
    try:
        import xarray
    except ImportError:
        raise ModuleNotFoundError(_MISSING, name="xarray") from None
    return xarray


def _attr(value: Any) -> Any:
    if isinstance(value, bool):
        return int(value)
    if isinstance(value, int | float | str):
        return value
    return json.dumps(value, allow_nan=True)


def to_xarray(
    source: str | Path | pd.DataFrame, meta: Mapping[str, Any] | None = None
) -> xarray.Dataset:
    """The points of result file ``source`` (or of a frame from ``read_results`` or
    ``read_truth``) as an ``xarray.Dataset`` indexed by ``point_id``, with the run's
    metadata (``read_meta``) in its attrs; ``meta`` is used with a frame only."""
    xr = _xarray()
    if isinstance(source, pd.DataFrame):
        frame = source
    else:
        from benchseq.results import read_meta, read_results

        frame, meta = read_results(source), read_meta(source)
    if "point_id" not in frame.columns:
        raise ValueError("to_xarray: the frame has no point_id column (not a benchseq table)")
    units = frame.attrs.get("units", {})
    descriptions = frame.attrs.get("descriptions", {})

    def variable(name: str) -> Any:
        attrs = {"units": str(units.get(name, ""))}
        if descriptions.get(name):
            attrs["long_name"] = str(descriptions[name])
        return xr.Variable(("point_id",), frame[name].to_numpy(), attrs)

    coords = {"point_id": variable("point_id")}
    coords |= {name: variable(name) for name in COORDINATES if name in frame.columns}
    data = {name: variable(name) for name in frame.columns if name not in coords}
    attrs = {str(k): _attr(v) for k, v in (meta or {}).items() if v is not None}
    return xr.Dataset(data, coords=coords, attrs=attrs)
