"""pipeline.reader: plain and tile-compressed FITS, scaling, units, observer fallback, bad input."""

from __future__ import annotations

import numpy as np
import pytest
from astropy.io import fits

from pipeline.config import MeasureSettings
from pipeline.reader import FrameError, read_frame, read_header
from tests._frames import declare_size, write_frame


@pytest.mark.parametrize("compression", [None, "RICE_1", "GZIP_1", "GZIP_2", "HCOMPRESS_1"])
def test_reads_plain_and_tile_compressed_scaled_int32(tmp_path, compression):
    """Reference library: astropy.io.fits decodes the same scaled int32 + BLANK image
    (BSCALE/BZERO/BLANK, FITS Standard 4.0 section 4.4.2.5) to the same gauss values and NaN."""
    path = write_frame(tmp_path / "f.fits", compression=compression, size=96, noise_gauss=3.0)
    frame = read_frame(path)
    with fits.open(path) as hdul:
        ref = hdul[-1].data.astype(np.float64)
    got = frame.full.astype(np.float64)
    assert np.array_equal(np.isnan(got), np.isnan(ref))
    assert np.nanmax(np.abs(got - ref)) <= 1e-6 * max(1.0, np.nanmax(np.abs(ref)))
    assert frame.header.observer.source == "header"
    assert frame.header.instrument.startswith("Halden Ridge Observatory")


def test_caps_region_reads_only_cap_rows_and_measures_the_same(tmp_path):
    """Claim: region="caps" reads a subset of the rows yet yields the same cap pixels as a full read."""
    from pipeline.measure import measure_frame

    path = write_frame(tmp_path / "f.fits", size=256, noise_gauss=2.0)
    settings = MeasureSettings()
    caps = read_frame(path, settings, region="caps")
    full = read_frame(path, settings, region="full")
    rows = sum(b.window.row1 - b.window.row0 for b in caps.blocks)
    assert rows < 256
    a, b = measure_frame(caps, settings), measure_frame(full, settings)
    assert a.north_pixels == b.north_pixels and a.south_pixels == b.south_pixels
    assert a.north_br_gauss == pytest.approx(b.north_br_gauss, rel=1e-12)
    assert a.south_flux_mx == pytest.approx(b.south_flux_mx, rel=1e-12)


@pytest.mark.parametrize("bunit, factor", [("Gauss", 1.0), ("GAUSS", 1.0), ("G", 1.0), ("gauss", 1.0),
                                           ("Mx/cm^2", 1.0), ("Mx/cm2", 1.0), ("T", 1.0e4), ("mT", 10.0)])
def test_field_units_accepted(tmp_path, bunit, factor):
    """Unit definitions: 1 G = 1 Mx cm^-2 = 1e-4 T (IAU style manual / astropy.units)."""
    def edit(h):
        h["BUNIT"] = bunit

    path = write_frame(tmp_path / "f.fits", size=64, header_edit=edit)
    assert read_header(path).gauss_per_unit == pytest.approx(factor, rel=1e-12)


@pytest.mark.parametrize("bunit", ["DN/s", "km/s", "erg/(s cm2)", "counts"])
def test_non_field_units_refused(tmp_path, bunit):
    def edit(h):
        h["BUNIT"] = bunit

    path = write_frame(tmp_path / "f.fits", size=64, header_edit=edit)
    with pytest.raises(FrameError, match="BUNIT .* not a magnetic field"):
        read_frame(path)


def test_intensity_file_from_sunpy_refused():
    """A real instrument file (sunpy test data, AIA 171 level 1, BUNIT counts) is refused with a reason."""
    from sunpy.data.test import get_test_filepath

    with pytest.raises(FrameError, match="BUNIT|magnetic"):
        read_frame(get_test_filepath("aia_171_level1.fits"))


def test_ephemeris_fallback_meeus_example_29a(tmp_path):
    """Meeus, Astronomical Algorithms (1991), Example 29.a, 1992 October 13 0h TD:
    B0 = +5.99 deg, L0 = 238.63 deg, P = 26.27 deg (from memory; sunpy.coordinates.sun agrees).
    0h TT = 1992-10-12T23:59:00.816 UTC (TT - UTC = 59.184 s then: 27 leap seconds + 32.184 s)."""
    from astropy.time import Time
    from sunpy.coordinates import sun

    def strip(h):
        for key in ("DSUN_OBS", "HGLT_OBS", "HGLN_OBS", "CRLT_OBS", "CRLN_OBS"):
            del h[key]

    path = write_frame(tmp_path / "f.fits", size=64, date_obs="1992-10-12T23:59:00.816", header_edit=strip)
    hdr = read_header(path)
    assert hdr.observer.source == "ephemeris"
    assert any("ephemeris" in n for n in hdr.notes)
    assert hdr.observer.b0_deg == pytest.approx(5.99, abs=0.01)
    assert hdr.observer.crln_deg == pytest.approx(238.63, abs=0.01)
    assert hdr.observer.distance_m == pytest.approx(0.99766 * 1.495978707e11, rel=1e-4)  # Meeus 25.a R, from memory
    assert sun.P(Time("1992-10-13 00:00:00", scale="tt")).deg == pytest.approx(26.27, abs=0.01)


def test_measure_reports_ephemeris_source(tmp_path):
    from pipeline.measure import measure_file

    def strip(h):
        for key in ("DSUN_OBS", "HGLT_OBS", "HGLN_OBS", "CRLT_OBS", "CRLN_OBS"):
            del h[key]

    rec = measure_file(write_frame(tmp_path / "f.fits", size=96, header_edit=strip))
    assert rec.status == "ok" and rec.observer_source == "ephemeris"


# --- bad input: every case gives a one-line reason ------------------------------------------

def _write_bytes(path, data: bytes):
    path.write_bytes(data)
    return path


def test_empty_file(tmp_path):
    with pytest.raises(FrameError, match="empty file"):
        read_frame(_write_bytes(tmp_path / "e.fits", b""))


def test_not_fits(tmp_path):
    with pytest.raises(FrameError, match="not a FITS file"):
        read_frame(_write_bytes(tmp_path / "n.fits", b"hello, this is text\n" * 200))


def test_missing_file(tmp_path):
    with pytest.raises(FrameError, match="cannot read file"):
        read_frame(tmp_path / "absent.fits")


@pytest.mark.parametrize("compression", [None, "RICE_1"])
def test_truncated(tmp_path, compression):
    path = write_frame(tmp_path / "t.fits", size=128, compression=compression, noise_gauss=5.0)
    raw = path.read_bytes()
    short = _write_bytes(tmp_path / "short.fits", raw[: len(raw) - 4000])
    with pytest.raises(FrameError, match="truncated|not a readable FITS|cannot decode"):
        read_frame(short)


def test_no_image_hdu(tmp_path):
    table = fits.BinTableHDU.from_columns([fits.Column(name="x", format="E", array=np.arange(3.0))])
    path = tmp_path / "table.fits"
    fits.HDUList([fits.PrimaryHDU(), table]).writeto(path)
    with pytest.raises(FrameError, match="no image HDU"):
        read_frame(path)


def test_no_time(tmp_path):
    def strip(h):
        del h["DATE-OBS"]

    with pytest.raises(FrameError, match="no observation time"):
        read_frame(write_frame(tmp_path / "f.fits", size=64, header_edit=strip))


def test_no_bunit(tmp_path):
    def strip(h):
        del h["BUNIT"]

    with pytest.raises(FrameError, match="no BUNIT"):
        read_frame(write_frame(tmp_path / "f.fits", size=64, header_edit=strip))


def test_absurd_dimensions_refused_before_allocation(tmp_path):
    """A header declaring 10^6 x 10^6 pixels in a tiny file is refused by the ceiling, not allocated."""
    path = declare_size(write_frame(tmp_path / "f.fits", size=64, compression=None), 1_000_000)
    with pytest.raises(FrameError, match="exceeds the ceiling"):
        read_frame(path)


def test_declared_size_larger_than_file(tmp_path):
    path = declare_size(write_frame(tmp_path / "f.fits", size=64, compression=None), 4000)
    with pytest.raises(FrameError, match="truncated"):
        read_frame(path, MeasureSettings())


def test_ceiling_is_configurable(tmp_path):
    path = write_frame(tmp_path / "f.fits", size=64)
    with pytest.raises(FrameError, match="exceeds the ceiling of 1000 pixels"):
        read_frame(path, MeasureSettings(max_image_pixels=1000))


def test_all_nan(tmp_path):
    path = write_frame(tmp_path / "f.fits", br=lambda lat, lon: np.full(lat.shape, np.nan), size=64)
    with pytest.raises(FrameError, match="no valid pixels"):
        read_frame(path)


def test_three_d_image_refused(tmp_path):
    path = tmp_path / "cube.fits"
    fits.PrimaryHDU(np.zeros((3, 8, 8), dtype=np.float32)).writeto(path)
    with pytest.raises(FrameError, match="not a 2-D image"):
        read_frame(path)


def test_not_helioprojective(tmp_path):
    def edit(h):
        h["CTYPE1"], h["CTYPE2"] = "RA---TAN", "DEC--TAN"

    with pytest.raises(FrameError, match="helioprojective|WCS"):
        read_frame(write_frame(tmp_path / "f.fits", size=64, header_edit=edit))


def test_requested_hdu_out_of_range(tmp_path):
    with pytest.raises(FrameError, match="HDU 5 requested"):
        read_frame(write_frame(tmp_path / "f.fits", size=64), MeasureSettings(hdu=5))


def test_region_validated(frame_file):
    with pytest.raises(ValueError, match="region: got 'edges'"):
        read_frame(frame_file, region="edges")
