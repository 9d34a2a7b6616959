"""pipeline.ncio: netCDF-4 with CF time encoding, written atomically."""

import numpy as np
import pytest
import xarray as xr

from pipeline.ncio import write_netcdf


def _dataset(value: float) -> xr.Dataset:
    t = np.array(["2031-01-01T00:00:00", "2031-01-28T07:12:00.250"], dtype="datetime64[ns]")
    return xr.Dataset({"north_br_gauss": ("time", np.array([value, -value]), {"units": "G"})}, coords={"time": t})


def test_round_trip_with_cf_time_encoding(tmp_path):
    # CF conventions (sec. 4.4): time as "units since reference", here float64 milliseconds: about 2e12 ms
    # since 1970 keep 2e12 x 2.2e-16 = 4e-4 ms (IEEE 754 double), so times come back to within 1 microsecond
    path = tmp_path / "series.nc"
    write_netcdf(_dataset(2.5), path)
    with xr.open_dataset(path) as back:
        back = back.load()
    assert back["time"].encoding["units"] == "milliseconds since 1970-01-01"
    err_ns = np.abs((back["time"].values - _dataset(2.5)["time"].values).astype(np.int64))
    assert err_ns.max() <= 1000
    np.testing.assert_array_equal(back["north_br_gauss"].values, [2.5, -2.5])
    assert back["north_br_gauss"].attrs["units"] == "G"


def test_a_torn_write_leaves_the_old_file(tmp_path, monkeypatch):
    """A write that dies after some bytes (full disk) leaves the previous file readable and unchanged and no
    temporary file (regression only)."""
    path = tmp_path / "series.nc"
    write_netcdf(_dataset(2.5), path)
    old = path.read_bytes()

    def torn(self, target, *args, **kwargs):
        with open(target, "wb") as fh:
            fh.write(b"\x89HDF\r\n\x1a\n")  # the HDF5 signature, then nothing
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(xr.Dataset, "to_netcdf", torn)
    with pytest.raises(OSError, match="No space left"):
        write_netcdf(_dataset(9.0), path)
    assert path.read_bytes() == old
    assert sorted(p.name for p in tmp_path.iterdir()) == ["series.nc"]
