"""netCDF-4 writing shared by every stage that writes xarray objects.

One engine choice and one time encoding (milliseconds since 1970 in the
proleptic Gregorian calendar, CF conventions) for the whole project.  Files
are written to a temporary file beside the target and renamed into place
(:func:`pipeline.jsonio.atomic_output`): a reader never sees half a file.
"""

from __future__ import annotations

import importlib.util
import os

import numpy as np

from pipeline.jsonio import atomic_output

__all__ = ["netcdf_engine", "time_encoding", "write_netcdf"]

_TIME_ENCODING = {"units": "milliseconds since 1970-01-01 00:00:00", "calendar": "proleptic_gregorian",
                  "dtype": "float64"}


def netcdf_engine() -> str:
    """The xarray netCDF-4 engine: netCDF4 (a runtime dependency), else h5netcdf with h5py.

    Raises
    ------
    RuntimeError
        When neither is installed, with the fix.
    """
    if importlib.util.find_spec("netCDF4") is not None:
        return "netcdf4"
    if importlib.util.find_spec("h5netcdf") is not None and importlib.util.find_spec("h5py") is not None:
        return "h5netcdf"
    raise RuntimeError("netCDF output needs the netCDF4 package (pip install netCDF4)")


def time_encoding(ds) -> dict:
    """CF time encoding for every datetime64 variable or coordinate of ``ds``."""
    return {name: dict(_TIME_ENCODING) for name, var in ds.variables.items()
            if np.issubdtype(var.dtype, np.datetime64)}


def write_netcdf(obj, path: str | os.PathLike, engine: str | None = None) -> None:
    """Write an xarray Dataset (or a named DataArray) to netCDF-4 with CF time encoding, atomically.

    A failure while writing (full disk, an unencodable variable, an
    interrupt) raises and leaves an existing ``path`` unchanged.
    """
    import xarray as xr

    ds = obj.to_dataset(name=obj.name or "values") if isinstance(obj, xr.DataArray) else obj
    engine = engine or netcdf_engine()
    with atomic_output(path) as tmp:
        ds.to_netcdf(tmp, engine=engine, encoding=time_encoding(ds))
