"""pipeline.reader: plain and tile-compressed FITS, scaling, units, observer fallback, bad input."""

from __future__ import annotations

import numpy as np
import pytest
from astropy.io import fits

from pipeline.config import MeasureSettings
from pipeline.reader import FrameError, read_frame, read_header
from tests._frames import declare_size, make_observer, write_frame


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
    B0 = +5.99 deg, L0 = 238.63 deg (from memory; sunpy.coordinates.sun agrees).
    0h TT = 1992-10-12T23:59:00.816 UTC (TT - UTC = 59.184 s then: 27 leap seconds + 32.184 s)."""
    path = write_frame(tmp_path / "f.fits", size=64, date_obs="1992-10-12T23:59:00.816",
                       header_edit=_drop(*_OBSERVER_KEYS))
    hdr = read_header(path)
    assert hdr.observer.source == "ephemeris"
    assert hdr.notes == ("observer keywords missing (HGLN_OBS, HGLT_OBS, CRLN_OBS, CRLT_OBS, DSUN_OBS): "
                         "Earth ephemeris used for latitude, longitude and distance",)
    assert hdr.observer.b0_deg == pytest.approx(5.99, abs=0.01)
    assert hdr.observer.crln_deg == pytest.approx(238.63, abs=0.01)
    assert hdr.observer.distance_m == pytest.approx(0.99766 * 1.495978707e11, rel=1e-4)  # Meeus 25.a R, from memory
    assert hdr.observer.hgln_deg == pytest.approx(0.0, abs=1e-9)  # the Earth defines Stonyhurst longitude 0


def test_measure_reports_ephemeris_source(tmp_path):
    """The record carries the observer's source and the reader's note (DESIGN.md: a fallback is recorded)."""
    from pipeline.measure import measure_file

    rec = measure_file(write_frame(tmp_path / "f.fits", size=96, header_edit=_drop(*_OBSERVER_KEYS)))
    assert (rec.status, rec.observer_source) == ("ok", "ephemeris")
    assert rec.notes == read_header(tmp_path / "f.fits").notes and "Earth ephemeris" in rec.notes[0]


# --- shapes and keywords: NAXIS3 = 1 cubes, partially missing observer keywords ---------------------------

_OBSERVER_KEYS = ("HGLN_OBS", "HGLT_OBS", "CRLN_OBS", "CRLT_OBS", "DSUN_OBS")
_OBS = make_observer(b0_deg=3.3, hgln_deg=12.0, crln_deg=200.0, distance_m=1.2e11)  # not the Earth's


def _drop(*keys):
    def edit(h):
        for key in keys:
            del h[key]
    return edit


def _earth(date_obs="2031-03-04T05:06:07"):
    """Reference library: the Earth's position from sunpy.coordinates.get_earth (Stonyhurst)."""
    import warnings

    from astropy.time import Time
    from sunpy.coordinates import get_earth

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return get_earth(Time(date_obs, scale="utc"))


def test_complete_observer_keywords_are_used_without_a_note(tmp_path):
    """Regression only: the header's own HGLN/HGLT/DSUN_OBS, source "header", no note."""
    hdr = read_header(write_frame(tmp_path / "f.fits", size=64, observer=_OBS))
    assert (hdr.observer.b0_deg, hdr.observer.hgln_deg, hdr.observer.distance_m) == (3.3, 12.0, 1.2e11)
    assert (hdr.observer.source, hdr.notes) == ("header", ())


def test_missing_distance_keeps_header_angles_and_says_so(tmp_path):
    """HGLN_OBS and HGLT_OBS without DSUN_OBS: sunpy would drop both angles and use the Earth (B0 -7.24
    instead of the header's 3.3); polecast keeps them and takes only the distance from the Earth's
    ephemeris (reference library: sunpy.coordinates.get_earth), and the record says which."""
    hdr = read_header(write_frame(tmp_path / "f.fits", size=64, observer=_OBS, header_edit=_drop("DSUN_OBS")))
    earth = _earth()
    assert (hdr.observer.b0_deg, hdr.observer.hgln_deg) == (3.3, 12.0)
    assert hdr.observer.distance_m == pytest.approx(earth.radius.to_value("m"), rel=1e-12)
    assert hdr.observer.source == "header+ephemeris"
    assert hdr.notes == (f"observer keywords partly missing (DSUN_OBS): HGLT_OBS, HGLN_OBS from the header; "
                         f"distance {earth.radius.to_value('m'):.6e} m from the Earth ephemeris",)
    from pipeline.measure import measure_file

    rec = measure_file(tmp_path / "f.fits")  # the record says the same
    assert (rec.status, rec.observer_source, rec.notes, rec.b0_deg) == ("ok", "header+ephemeris", hdr.notes, 3.3)


def test_only_carrington_latitude_gives_b0_the_rest_from_the_earth(tmp_path):
    """Only CRLT_OBS: B0 is the header's (Carrington and Stonyhurst latitudes are the same, both frames
    share the rotation axis: Thompson 2006, A&A 449, 791, section 3); longitude and distance are the
    Earth's (sunpy.coordinates.get_earth; Stonyhurst longitude 0 by definition), named in the note."""
    path = write_frame(tmp_path / "f.fits", size=64, observer=_OBS,
                       header_edit=_drop("HGLN_OBS", "HGLT_OBS", "CRLN_OBS", "DSUN_OBS"))
    hdr = read_header(path)
    earth = _earth()
    assert hdr.observer.b0_deg == 3.3 and hdr.observer.source == "header+ephemeris"
    assert hdr.observer.hgln_deg == pytest.approx(0.0, abs=1e-9)
    assert hdr.observer.distance_m == pytest.approx(earth.radius.to_value("m"), rel=1e-12)
    assert hdr.notes == ("observer keywords partly missing (HGLN_OBS, HGLT_OBS, CRLN_OBS, DSUN_OBS): CRLT_OBS "
                         f"from the header; distance {earth.radius.to_value('m'):.6e} m, Stonyhurst longitude "
                         "0.0000 deg from the Earth ephemeris",)


def test_carrington_pair_without_distance_converted_by_sunpy(tmp_path):
    """CRLN_OBS and CRLT_OBS without DSUN_OBS or HGLN/HGLT_OBS: the Carrington longitude is converted to
    Stonyhurst by sunpy's Carrington frame (observer "self", the reference library) at the Earth's distance;
    the header's Carrington longitude is kept exactly."""
    from astropy.time import Time
    from sunpy.coordinates import HeliographicCarrington, HeliographicStonyhurst
    import astropy.units as u

    path = write_frame(tmp_path / "f.fits", size=64, observer=_OBS,
                       header_edit=_drop("HGLN_OBS", "HGLT_OBS", "DSUN_OBS"))
    hdr = read_header(path)
    earth = _earth()
    t = Time("2031-03-04T05:06:07", scale="utc")
    ref = HeliographicCarrington(200.0 * u.deg, 3.3 * u.deg, earth.radius, observer="self", obstime=t)
    ref_lon = ref.transform_to(HeliographicStonyhurst(obstime=t)).lon.to_value(u.deg)
    assert hdr.observer.hgln_deg == pytest.approx(ref_lon, abs=1e-9)
    assert hdr.observer.crln_deg == pytest.approx(200.0, abs=1e-9)
    assert (hdr.observer.b0_deg, hdr.observer.source) == (3.3, "header+ephemeris")
    assert "CRLT_OBS, CRLN_OBS from the header" in hdr.notes[0] and "distance" in hdr.notes[0]


def test_only_distance_takes_the_angles_from_the_earth(tmp_path):
    """Only DSUN_OBS: the distance is the header's, B0 and longitude the Earth's (sunpy.coordinates.get_earth)."""
    path = write_frame(tmp_path / "f.fits", size=64, observer=_OBS,
                       header_edit=_drop("HGLN_OBS", "HGLT_OBS", "CRLN_OBS", "CRLT_OBS"))
    hdr = read_header(path)
    earth = _earth()
    assert hdr.observer.distance_m == 1.2e11
    assert hdr.observer.b0_deg == pytest.approx(earth.lat.to_value("deg"), abs=1e-9)
    assert hdr.observer.source == "header+ephemeris"
    assert f"latitude B0 {earth.lat.to_value('deg'):.4f} deg" in hdr.notes[0]


def test_incomplete_set_passed_over_is_named(tmp_path):
    """HGLT_OBS missing while CRLN/CRLT/DSUN_OBS are complete: sunpy uses the Carrington set (its order,
    sunpy.map.GenericMap._supported_observer_coordinates) and the ignored HGLN_OBS is named."""
    import warnings

    import sunpy.map

    path = write_frame(tmp_path / "f.fits", size=64, observer=_OBS, header_edit=_drop("HGLT_OBS"))
    hdr = read_header(path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = sunpy.map.Map(path).observer_coordinate  # reference library: what sunpy itself uses
    assert hdr.observer.hgln_deg == pytest.approx(ref.lon.to_value("deg"), abs=1e-9)
    assert hdr.observer.hgln_deg != pytest.approx(12.0, abs=1.0)  # the header's HGLN_OBS is not used...
    assert (hdr.observer.b0_deg, hdr.observer.source) == (3.3, "header")
    assert hdr.notes == ("observer from CRLN_OBS, CRLT_OBS, DSUN_OBS; HGLN_OBS not used (HGLT_OBS missing)",)


@pytest.mark.parametrize("drop, note", [
    (("RSUN_REF",), "RSUN_REF missing: solar radius 6.960000e+08 m from the angular radius and the distance"),
    (("RSUN_REF", "RSUN_OBS"), "RSUN_REF and RSUN_OBS missing: standard photospheric radius 6.957000e+08 m used"),
])
def test_missing_solar_radius_is_said(tmp_path, drop, note):
    """R = D sin(RSUN_OBS) (sunpy's rule; the header was written with RSUN_OBS = arcsin(R / D)), else the
    IAU 2015 nominal radius 695 700 km (Prsa et al. 2016, AJ 152, 41; sunpy.sun.constants.radius)."""
    hdr = read_header(write_frame(tmp_path / "f.fits", size=64, header_edit=_drop(*drop)))
    assert hdr.notes == (note,)
    assert hdr.observer.rsun_m == pytest.approx(float(note.split(" m ")[0].split()[-1]), rel=1e-6)


@pytest.mark.parametrize("key, value", [("DSUN_OBS", "far"), ("HGLT_OBS", True), ("HGLN_OBS", "12 deg")])
def test_observer_keyword_that_is_not_a_number_is_refused(tmp_path, key, value):
    def edit(h):
        h[key] = value

    with pytest.raises(FrameError, match=f"observer keyword {key} = .* is not a finite number"):
        read_header(write_frame(tmp_path / "f.fits", size=64, header_edit=edit))


def _cube(tmp_path, depth, compression=None):
    """The 2-D test frame's integers and header as an (depth, ny, nx) cube (NAXIS = 3)."""
    flat = write_frame(tmp_path / "flat.fits", size=96, noise_gauss=2.0, compression=None)
    with fits.open(flat, do_not_scale_image_data=True) as hdul:
        ints, header = hdul[0].data.copy(), hdul[0].header.copy()
    cube = np.repeat(ints[None], depth, axis=0)
    path = tmp_path / f"cube{depth}.fits"
    if compression is None:
        hdu = fits.PrimaryHDU(cube, header=header, do_not_scale_image_data=True)
    else:
        hdu = fits.CompImageHDU(cube, header=header, compression_type=compression, do_not_scale_image_data=True)
    for key in ("BSCALE", "BZERO", "BLANK"):  # as pipeline.synth.instrument.write_magnetogram sets them
        hdu.header[key] = header[key]
    fits.HDUList([hdu] if compression is None else [fits.PrimaryHDU(), hdu]).writeto(path)
    return flat, path


@pytest.mark.parametrize("compression", [None, "RICE_1"])
def test_naxis3_of_one_is_read_as_the_flat_image(tmp_path, compression):
    """FITS Standard 4.0 section 4.4.1: a degenerate axis NAXIS3 = 1 leaves a 2-D image; the cube reads
    and measures exactly as the 2-D file with the same integers and header (regression only)."""
    from pipeline.measure import measure_file

    flat, cube = _cube(tmp_path, 1, compression)
    assert fits.getheader(cube, -1)["NAXIS"] == 3
    a, b = read_frame(flat), read_frame(cube)
    assert np.array_equal(a.full, b.full, equal_nan=True)
    ra, rb = measure_file(flat), measure_file(cube)
    assert (rb.status, rb.north_pixels, rb.north_br_gauss, rb.south_flux_mx) == \
        ("ok", ra.north_pixels, ra.north_br_gauss, ra.south_flux_mx)


def test_naxis3_of_two_is_refused(tmp_path):
    _, cube = _cube(tmp_path, 2)
    with pytest.raises(FrameError, match=r"not a 2-D image \(NAXIS = 3, shape \[96, 96, 2\]\)"):
        read_frame(cube)


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


# --- gzip-wrapped files ---------------------------------------------------------------------------------

def test_gzip_wrapped_file_reads_as_the_plain_one(tmp_path):
    """RFC 1952 gzip around a whole FITS file (also as two members, and with trailing zero padding, which
    the gzip tool accepts): the same image as the plain file (reference: the plain file, astropy)."""
    import gzip

    plain = write_frame(tmp_path / "p.fits", size=64, compression=None, noise_gauss=1.0)
    raw = plain.read_bytes()
    ref = read_frame(plain).full
    for name, data in (("one", gzip.compress(raw)), ("two", gzip.compress(raw[:5760]) + gzip.compress(raw[5760:])),
                       ("padded", gzip.compress(raw) + bytes(512))):
        got = read_frame(_write_bytes(tmp_path / f"{name}.fits.gz", data)).full
        assert np.array_equal(got, ref, equal_nan=True), name


def test_truncated_gzip_refused_with_a_reason(tmp_path):
    import gzip

    packed = gzip.compress(write_frame(tmp_path / "p.fits", size=64, compression=None).read_bytes())
    for cut in (40, len(packed) // 2, len(packed) - 4):
        with pytest.raises(FrameError, match="^truncated gzip stream"):
            read_frame(_write_bytes(tmp_path / "t.fits.gz", packed[:cut]))


def test_damaged_gzip_refused_with_a_reason(tmp_path):
    """A flipped byte inside the deflate data, or garbage after the stream: zlib's check fails."""
    import gzip

    packed = bytearray(gzip.compress(write_frame(tmp_path / "p.fits", size=64, compression=None).read_bytes()))
    packed[len(packed) // 2] ^= 0xFF
    with pytest.raises(FrameError, match="^corrupt gzip stream"):
        read_frame(_write_bytes(tmp_path / "d.fits.gz", bytes(packed)))
    packed = gzip.compress(write_frame(tmp_path / "p.fits", size=64, compression=None).read_bytes())
    with pytest.raises(FrameError, match="^corrupt gzip stream"):
        read_frame(_write_bytes(tmp_path / "g.fits.gz", packed + b"trailing text"))


def test_gzip_expanding_past_the_ceiling_refused(tmp_path):
    """A small gzip file that inflates past 16 x measure.max_image_pixels + 16 MiB bytes is refused
    before it is held in memory (20 MiB of zeros pack into about 20 kB)."""
    import gzip

    bomb = _write_bytes(tmp_path / "b.fits.gz", gzip.compress(bytes(20 << 20)))
    with pytest.raises(FrameError, match="gzip stream expands beyond"):
        read_frame(bomb, MeasureSettings(max_image_pixels=1000))


# --- corrupt input gives FrameError with a reason; an unexpected error propagates ----------------------------

def _rewrite_card(path, key, value_text):
    """Overwrite a header card's value field with raw text (a hostile or damaged header)."""
    raw = bytearray(path.read_bytes())
    i = raw.index(key.ljust(8).encode() + b"= ")
    raw[i:i + 80] = (key.ljust(8) + "= " + value_text).ljust(80).encode()
    path.write_bytes(bytes(raw))
    return path


def _set(key, value):
    def edit(h):
        h[key] = value
    return edit


@pytest.mark.parametrize("edit, reason", [
    (_set("DATE-OBS", "not a date"), r"unreadable observation time \(DATE-OBS = 'not a date'"),
    (_set("DATE-OBS", "2031-13-45T00:00:00"), "unreadable observation time"),
    (_set("DATE-OBS", "2300-01-01T00:00:00"), "outside 1678-2261"),
    (_set("CTYPE1", 12.5), "header keyword CTYPE1 = 12.5 is not a string"),
    (_set("CDELT1", "abc"), "invalid solar WCS header"),
    (_set("CRPIX1", "centre"), "invalid solar WCS header"),
    (_set("CUNIT1", "m"), "incomplete solar WCS header"),
    (_set("DSUN_OBS", "far"), "observer keyword DSUN_OBS = 'far' is not a finite number"),
])
def test_corrupt_header_values_refused_with_a_reason(tmp_path, edit, reason):
    """Each value that sunpy, astropy.wcs or astropy.time reject (found by trying them) is a FrameError
    naming it; a date sunpy cannot parse is never replaced by the current time (sunpy's own fallback)."""
    with pytest.raises(FrameError, match=reason):
        read_frame(write_frame(tmp_path / "f.fits", size=64, header_edit=edit))


def test_unparsable_card_and_damaged_tiles_refused(tmp_path):
    plain = _rewrite_card(write_frame(tmp_path / "u.fits", size=64, compression=None), "CDELT1", "1.0.0")
    with pytest.raises(FrameError, match=r"unparsable header card \(Unparsable card \(CDELT1\)"):
        read_frame(plain)
    path = write_frame(tmp_path / "r.fits", size=96, compression="RICE_1", noise_gauss=3.0)
    raw = bytearray(path.read_bytes())
    raw[-3000:-2000] = bytes(1000)  # zero a stretch of compressed tiles
    with pytest.raises(FrameError, match="cannot decode image data"):
        read_frame(_write_bytes(tmp_path / "z.fits", bytes(raw)))


def test_directory_refused(tmp_path):
    with pytest.raises(FrameError, match="cannot read file: Is a directory"):
        read_frame(tmp_path)


def test_rice_parameters_outside_the_standard_refused_not_crashing(tmp_path):
    """FITS Standard 4.0 section 10.4.1 (from memory): BYTEPIX is 1, 2, 4 or 8.  astropy's RICE decoder
    crashes the process (SIGSEGV) on BYTEPIX = -4, so this runs in a subprocess: a crash is then a test
    failure, not a lost test session."""
    import subprocess
    import sys

    path = _rewrite_card(write_frame(tmp_path / "r.fits", size=64, compression="RICE_1"), "ZVAL2",
                         f"{-4:>20d}")
    code = ("import sys; from pipeline.reader import read_frame, FrameError\n"
            "try:\n    read_frame(sys.argv[1])\nexcept FrameError as exc:\n    print(exc)\n")
    out = subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, f"reader process ended with {out.returncode}: {out.stderr[-300:]}"
    assert out.stdout.startswith("corrupt RICE_1 parameters: BYTEPIX = -4")


class _Injected(Exception):
    """An error no corrupt file raises: it must propagate out of read_frame with its message."""


def _raiser(exc):
    def boom(*args, **kwargs):
        raise exc
    return boom


@pytest.mark.parametrize("target, exc", [
    ("astropy.io.fits.open", RuntimeError("injected in fits.open")),
    ("sunpy.map.Map", RuntimeError("injected in sunpy.map.Map")),
    ("pipeline.reader._read_rows", _Injected("injected in the decoder")),
    ("pipeline.reader.plan_windows", ZeroDivisionError("injected in window planning")),
])
def test_unexpected_error_propagates(tmp_path, monkeypatch, target, exc):
    """Claim (issue 17): only what corrupt input raises becomes a FrameError; any other error propagates
    unchanged, so that a caller can tell a fault (retry) from a bad file (skip)."""
    path = write_frame(tmp_path / "f.fits", size=64)
    monkeypatch.setattr(target, _raiser(exc))
    with pytest.raises(type(exc), match=str(exc)):
        read_frame(path, region="caps")


def test_unexpected_error_in_the_ephemeris_propagates(tmp_path, monkeypatch):
    path = write_frame(tmp_path / "f.fits", size=64, header_edit=_drop(*_OBSERVER_KEYS))
    monkeypatch.setattr("sunpy.coordinates.get_earth", _raiser(RuntimeError("ephemeris unavailable")))
    with pytest.raises(RuntimeError, match="ephemeris unavailable"):
        read_header(path)


def test_map_source_observer_rule_is_followed_and_named():
    """Reference library: for sunpy's GONG magnetogram header (sunpy.data.test) the map source has its own
    observer rule (the site's position); polecast uses exactly sunpy's observer and says whose rule it was."""
    import types
    import warnings

    import sunpy.map
    from sunpy.data.test import get_test_filepath

    from pipeline.reader import _header_from_hdu

    header = fits.Header.fromtextfile(get_test_filepath("gong_magnetogram.header"))
    shape = (header["NAXIS2"], header["NAXIS1"])
    hdr = _header_from_hdu("gong", types.SimpleNamespace(header=header), 0, shape)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = sunpy.map.Map(np.zeros(shape, dtype=np.float32), header).observer_coordinate
    assert hdr.observer.distance_m == pytest.approx(ref.radius.to_value("m"), rel=1e-12)
    assert hdr.observer.b0_deg == pytest.approx(ref.lat.to_value("deg"), abs=1e-9)
    assert hdr.observer.source == "header"
    assert hdr.notes[0] == "observer by sunpy's GONGMagnetogramMap rule for this instrument"


def test_map_source_default_observer_is_used_and_named(tmp_path, monkeypatch):
    """sunpy lets a map source name a default observer for headers without observer keywords
    (GenericMap._default_observer_coordinate); polecast uses it, not the Earth, and says so."""
    import astropy.units as u
    import sunpy.map
    from astropy.coordinates import SkyCoord

    site = SkyCoord(lon=1.5 * u.deg, lat=2.5 * u.deg, radius=1.4e11 * u.m, obstime="2031-03-04T05:06:07",
                    frame="heliographic_stonyhurst")
    monkeypatch.setattr(sunpy.map.GenericMap, "_default_observer_coordinate", property(lambda self: site))
    hdr = read_header(write_frame(tmp_path / "f.fits", size=64, header_edit=_drop(*_OBSERVER_KEYS)))
    assert (hdr.observer.hgln_deg, hdr.observer.b0_deg) == pytest.approx((1.5, 2.5), abs=1e-9)
    assert hdr.observer.distance_m == pytest.approx(1.4e11, rel=1e-12)
    assert hdr.observer.source == "instrument default"
    assert hdr.notes == ("observer keywords missing (HGLN_OBS, HGLT_OBS, CRLN_OBS, CRLT_OBS, DSUN_OBS): "
                         "sunpy's GenericMap default observer used",)
