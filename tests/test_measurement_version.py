"""How the measurement-code version is kept (issue 17): a guard, regression only.

``pipeline.measure.MEASUREMENT_VERSION`` must be bumped by hand whenever the reader, the projection or the
measurement change a measured number (module docstring of pipeline.measure).  The store keeps it beside every
record, and ingest re-measures records of another version (tests/test_batch.py).  This test holds the numbers
each version gives for two small frames of tests/_ingest_archive.py; when they change, it fails and says what
to do: bump the version and add its numbers here.  Values: regression only (written by this code itself).
"""

from __future__ import annotations

import pytest

from pipeline.measure import MEASUREMENT_VERSION, measure_file
from tests._ingest_archive import write_good

#: version -> frame k of write_good(k, size=64) -> (north_br_gauss, south_br_gauss, north_flux_mx, north_pixels,
#: south_pixels, north_br_error_gauss); regression only
NUMBERS = {
    1: {0: (3.4610103260771656, -2.8814895962785365, 5.40346992779615e+21, 70, 70, 0.15456332496451114),
        5: (4.450384834352674, -2.7964134440517223, 9.676668533620137e+21, 118, 38, 0.16393885483030032)},
    # issue 11: noise-weighted within latitude bins, bins by area; the error is the within-bin (stratified)
    # scatter, no longer the field's own variation across the cap
    2: {0: (3.4571666935285146, -2.876569936744807, 5.40346992779615e+21, 70, 70, 0.002100306772090665),
        5: (4.454932671777214, -2.7948138740101527, 9.676668533620137e+21, 118, 38, 0.005075938488471805)},
}


@pytest.mark.parametrize("k", [0, 5])
def test_measured_numbers_are_those_of_this_measurement_version(tmp_path, k):
    assert MEASUREMENT_VERSION in NUMBERS, (
        f"MEASUREMENT_VERSION {MEASUREMENT_VERSION} has no numbers here: add the new version's numbers")
    r = measure_file(write_good(tmp_path / "f.fits", k, size=64))
    got = (r.north_br_gauss, r.south_br_gauss, r.north_flux_mx, r.north_pixels, r.south_pixels,
           r.north_br_error_gauss)
    want = NUMBERS[MEASUREMENT_VERSION][k]
    assert got[3:5] == want[3:5] and got == pytest.approx(want, rel=1e-9), (
        f"the measurement code gives other numbers than version {MEASUREMENT_VERSION} did (got {got}); if the "
        f"change is intended, bump pipeline.measure.MEASUREMENT_VERSION and add its numbers to NUMBERS")
