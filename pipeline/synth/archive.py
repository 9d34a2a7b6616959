"""Write a synthetic KVM archive: one FITS file per observation plus the truth products.

Files written into the output directory:

``kvm_YYYYMMDD_HHMMSS.fits``
    Line-of-sight magnetograms (scaled int32 with BLANK, RICE tile-compressed).
``truth.json``
    Star, instrument, seed, span, reversal epochs, cycle landmarks (a minimum
    or maximum outside the span is null), the last minimum's precursor and the
    next cycle's amplitude (known to the star even after the span), generator
    arguments.
``truth_caps.csv``
    ``time, decimal_year, north_br_gauss, south_br_gauss, dipole_br_gauss``:
    true whole-cap means (every transport step, 5 days by default).
``truth_frames.csv``
    ``file, time, north_visible_br_gauss, south_visible_br_gauss``: true
    axisymmetric-field means over the visible part of each cap of each frame.
``truth_br.nc``
    ``br(latitude, time)`` of the axisymmetric field over the span.
``sunspots.csv``
    ``time,sunspot_number``: monthly means, time as decimal year.
``calibration.csv``
    ``cycle,precursor,amplitude,precursor_error,amplitude_error,phase,scale``
    of earlier cycles (:func:`calibration_csv_text`): one row per cycle at the
    phase ``minimum`` and at each ``reversal+L`` (L = 2, 3, 4, 5, 6 years after
    the cycle's final dipole reversal) whose window fits, all from the star's
    true whole-cap dipole; ``scale`` names that
    (:data:`pipeline.synth.truth.TRUTH_SCALE`).

The same seed gives the same star and, for the same arguments, byte-identical
FITS files (no wall-clock dates, no CHECKSUM/DATASUM cards); each frame's
noise is seeded by the seed and the frame time, so any frame can be
regenerated alone.
"""

from __future__ import annotations

import csv
import json
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from pipeline.projection import Observer, Window, surface_points
from pipeline.synth.instrument import (INSTRUMENT, OBSERVATORY, ObservingSetup, earth_observers, frame_header,
                                       geometry_for, instrument_noise, write_magnetogram)
from pipeline.synth.star import StarHistory, StarParameters, datetime64_to_days, star_history
from pipeline.synth.surface import SurfaceOptions, surface_field
from pipeline.synth.truth import (TRUTH_SCALE, calibration_rows, cycle_landmarks_truth, pearson_r,
                                  phase_precursors, precursor_gauss, sign_changes_yr, visible_cap_means_gauss)

__all__ = ["ArchiveSettings", "ArchiveResult", "frame_times", "frame_name", "render_frame", "write_frame_file",
           "truth_summary", "calibration_csv_text", "zero_offset_at_gauss", "truth_json_text", "CALIBRATION_COLUMNS", "write_archive",
           "SPAN_LIMITS_YR"]

#: columns of the archive's calibration.csv (the order ``pipeline.regression.format_calibration_csv`` writes)
CALIBRATION_COLUMNS = ("cycle", "precursor", "amplitude", "precursor_error", "amplitude_error", "phase", "scale")

#: spans must leave spin-up before them and room for the next cycle after them (decimal years)
SPAN_LIMITS_YR = (1760.0, 2110.0)

#: BLANK of the archive's files: just outside the data range (+-32767 x BSCALE), compact with RICE
COMPACT_BLANK = -32768


@dataclass(frozen=True)
class ArchiveSettings:
    """Arguments of one archive (what ``polecast synth`` takes).

    Attributes
    ----------
    start, end : str
        ``YYYY-MM-DD`` (UTC midnight); observations at ``start + k cadence`` before or at ``end``.
    cadence_days : float
    size : int
        Image side, pixels.
    seed : int
    rotation_deg : float
        Image rotation (CROTA2), degrees.
    offset_pixels : tuple of float
        Disk-centre offset from the image centre, pixels.
    noise_gauss : float
        Instrument noise per pixel (line of sight), gauss.
    network_gauss : float
        RMS of the network pattern (Br), gauss.
    regions : bool
        Draw active regions.
    bscale_gauss : float
        Quantisation step of the stored integers, gauss.
    zero_offset_gauss : float
        Zero-point offset of the magnetograph: added to every on-disk Blos
        pixel before the noise and the quantisation, gauss (line of sight).
    zero_offset_drift_gauss_per_year : float
        Linear drift of that offset from ``start``: the offset of a frame at
        time ``t`` is ``zero_offset_gauss + drift * (t - start)`` (decimal
        years), gauss per year.
    """

    start: str = "2031-01-01"
    end: str = "2032-01-01"
    cadence_days: float = 27.0
    size: int = 256
    seed: int = 1
    rotation_deg: float = 0.0
    offset_pixels: tuple = (0.0, 0.0)
    noise_gauss: float = 2.0
    network_gauss: float = 3.0
    regions: bool = True
    bscale_gauss: float = 0.5
    zero_offset_gauss: float = 0.0
    zero_offset_drift_gauss_per_year: float = 0.0

    def __post_init__(self):
        from pipeline.config import check_number
        from pipeline.timeutil import decimal_year

        for name in ("start", "end"):
            value = getattr(self, name)
            try:
                np.datetime64(str(value), "D")
            except ValueError:
                raise ValueError(f"{name}: got {value!r}; expected a date YYYY-MM-DD") from None
        y0, y1 = decimal_year(np.datetime64(self.start)), decimal_year(np.datetime64(self.end))
        lo, hi = SPAN_LIMITS_YR
        if not (lo <= y0 < y1 <= hi):
            raise ValueError(f"start/end: got {self.start}..{self.end}; need start < end within "
                             f"{lo:.0f}-01-01..{hi:.0f}-01-01 (the star's recorded history)")
        check_number("cadence_days", self.cadence_days, lo=0.01, hi=3650.0)
        check_number("size", self.size, lo=16, hi=8192, integer=True)
        check_number("seed", self.seed, lo=0, integer=True)
        check_number("rotation_deg", self.rotation_deg, lo=-360.0, hi=360.0)
        if len(self.offset_pixels) != 2:
            raise ValueError(f"offset_pixels: got {self.offset_pixels!r}; expected two numbers (x, y)")
        for v in self.offset_pixels:
            check_number("offset_pixels", v, lo=-self.size / 4, hi=self.size / 4)
        check_number("noise_gauss", self.noise_gauss, lo=0.0)
        check_number("network_gauss", self.network_gauss, lo=0.0)
        check_number("bscale_gauss", self.bscale_gauss, lo=0.0, lo_open=True)
        check_number("zero_offset_gauss", self.zero_offset_gauss, lo=-1000.0, hi=1000.0)
        check_number("zero_offset_drift_gauss_per_year", self.zero_offset_drift_gauss_per_year, lo=-1000.0,
                     hi=1000.0)


@dataclass(frozen=True)
class ArchiveResult:
    """What :func:`write_archive` wrote."""

    out_dir: str
    files: tuple
    failed: tuple = ()
    truth: dict = field(default_factory=dict)


def frame_times(start: str, end: str, cadence_days: float) -> np.ndarray:
    """Observation times ``start + k cadence`` up to ``end`` (datetime64[ns], whole seconds)."""
    t0 = np.datetime64(start, "s")
    t1 = np.datetime64(end, "s")
    step = float(cadence_days) * 86400.0
    n = int(np.floor((t1 - t0).astype(np.int64) / step + 1e-9)) + 1
    secs = np.round(np.arange(n) * step).astype(np.int64)
    return (t0 + secs.astype("timedelta64[s]")).astype("datetime64[ns]")


def frame_name(t) -> str:
    """``kvm_YYYYMMDD_HHMMSS.fits`` for an observation time."""
    s = str(np.datetime64(t, "s"))
    return f"kvm_{s[0:4]}{s[5:7]}{s[8:10]}_{s[11:13]}{s[14:16]}{s[17:19]}.fits"


def _frame_rng(seed: int, t) -> np.random.Generator:
    secs = int(np.datetime64(t, "s").astype(np.int64))
    return np.random.default_rng(np.random.SeedSequence([int(seed), 4, secs & 0xFFFFFFFF, (secs >> 32) & 0xFFFFFFFF]))


def _render_los(br, geometry, observer) -> np.ndarray:
    """:func:`pipeline.synth.instrument.render_los` without the limb-area refinement it does not use.

    ``mu_floor`` above 1 tells :func:`pipeline.projection.surface_points` to skip the
    sub-pixel limb areas (rendering needs latitude, longitude and mu only); the
    image is identical.
    """
    ny, nx = geometry.shape
    s = surface_points(geometry, observer, Window(0, ny, 0, nx), mu_floor=2.0)
    out = np.full((ny, nx), np.nan)
    on = s.on_disk
    out[on] = br(s.latitude_deg[on], s.carrington_longitude_deg[on]) * s.mu[on]
    return out


def zero_offset_at_gauss(settings: ArchiveSettings, t) -> float:
    """The magnetograph's zero-point offset at time ``t``: constant plus linear drift from ``start`` (gauss)."""
    if settings.zero_offset_drift_gauss_per_year == 0.0:
        return float(settings.zero_offset_gauss)
    from pipeline.timeutil import decimal_year

    years = decimal_year(np.datetime64(t, "ns")) - decimal_year(np.datetime64(settings.start))
    return float(settings.zero_offset_gauss + settings.zero_offset_drift_gauss_per_year * years)


def render_frame(history: StarHistory, t, observer: Observer, settings: ArchiveSettings):
    """Line-of-sight image (gauss, NaN off disk), its geometry and the visible-cap truth.

    Returns
    -------
    blos : ndarray
    geometry : ImageGeometry
    visible : (north, south) tuple of float
        Mean axisymmetric Br over the visible part of each cap (mu >= 0.1, |lat| >= 60).
    """
    setup = ObservingSetup(size=settings.size, rotation_deg=settings.rotation_deg,
                           offset_pixels=tuple(settings.offset_pixels))
    geometry = geometry_for(setup, observer)
    t_days = datetime64_to_days(np.datetime64(t, "ns"))
    opts = SurfaceOptions(regions=settings.regions, network_gauss=settings.network_gauss)
    br = surface_field(history, t_days, opts)
    blos = _render_los(br, geometry, observer)
    on = np.isfinite(blos)
    offset = zero_offset_at_gauss(settings, t)
    if offset != 0.0:  # skipped at 0 so that offset-free frames keep their bytes
        blos[on] += offset
    blos[on] += instrument_noise(int(on.sum()), settings.noise_gauss, _frame_rng(history.seed, t),
                                 "gaussian" if settings.noise_gauss > 0 else "none")
    visible = visible_cap_means_gauss(br.profile_lat_deg, br.profile_br_gauss, observer.b0_deg,
                                      observer.distance_m, observer.rsun_m)
    return blos, geometry, visible


def write_frame_file(path, history: StarHistory, t, observer: Observer, settings: ArchiveSettings) -> tuple:
    """Render and write one FITS frame; returns the visible-cap truth (north, south)."""
    blos, geometry, visible = render_frame(history, t, observer, settings)
    header = frame_header(geometry, observer, str(np.datetime64(t, "ms")))
    header["BUNIT"] = ("Gauss", "line-of-sight field")
    header["ORIGIN"] = ("polecast synth", "synthetic data of the star Tessaly")
    header["SYNSEED"] = (int(settings.seed), "seed of the synthetic star")
    write_magnetogram(path, blos, header, compression="RICE_1", bscale=settings.bscale_gauss, blank=COMPACT_BLANK)
    return visible


def _span_yr(settings: ArchiveSettings) -> tuple:
    from pipeline.timeutil import decimal_year

    return decimal_year(np.datetime64(settings.start)), decimal_year(np.datetime64(settings.end))


def truth_summary(history: StarHistory, settings: ArchiveSettings, cap_latitude_deg: float = 60.0) -> dict:
    """The ``truth.json`` object for a span of the star's history."""
    y0, y1 = _span_yr(settings)
    ty = history.time_yr
    in_span = (ty >= y0) & (ty <= y1)
    rev = {}
    final = {}
    for pole, series in (("north", history.north_gauss), ("south", history.south_gauss)):
        rev[pole] = sign_changes_yr(ty[in_span], series[in_span])
        final[pole] = rev[pole][-1] if rev[pole] else None
    landmarks = cycle_landmarks_truth(history)
    cycles = [dict(lm) for lm in landmarks
              if (y0 <= lm["minimum_time"] <= y1) or (y0 <= lm["maximum_time"] <= y1)]
    for lm in cycles:  # landmarks outside the span are unknown to an observer of the span
        for kind in ("minimum", "maximum"):
            if not (y0 <= lm[f"{kind}_time"] <= y1):
                lm[f"{kind}_time"] = lm[f"{kind}_value"] = None
    minima = [lm for lm in landmarks if y0 <= lm["minimum_time"] <= y1]
    last = minima[-1] if minima else None
    next_cycle = last  # the cycle that starts at the last minimum (its maximum may lie after the span)
    precursor = precursor_gauss(history, last["minimum_time"]) if last else (None, None)
    at_phase = _last_cycle_phases(history, landmarks, last, (y0, y1))
    calib = calibration_rows(history, y0)
    by_phase = {}
    for row in calib:
        by_phase.setdefault(row["phase"], []).append(row)
    calib_min = by_phase.get("minimum", [])
    return {
        "star": history.params.name,
        "instrument": f"{INSTRUMENT} (Kestrel Vector Magnetograph, fictional), {OBSERVATORY}",
        "seed": int(history.seed),
        "cap_latitude_deg": float(cap_latitude_deg),
        "span": [str(np.datetime64(settings.start, "s")) + "Z", str(np.datetime64(settings.end, "s")) + "Z"],
        "reversals": rev,
        "final_reversals": final,
        "cycles": cycles,
        "last_minimum_time": last["minimum_time"] if last else None,
        "precursor_at_last_minimum": precursor[0],
        "precursor_at_last_minimum_error": precursor[1],
        "final_dipole_reversal": at_phase["reversal_time"],
        "precursor_at_phase": {k: v["precursor"] for k, v in at_phase["phases"].items()},
        "precursor_at_phase_error": {k: v["precursor_error"] for k, v in at_phase["phases"].items()},
        "precursor_window_centre": {k: v["center_time"] for k, v in at_phase["phases"].items()},
        "next_amplitude": next_cycle["maximum_value"] if last else None,
        "next_maximum_time": next_cycle["maximum_time"] if last else None,
        "next_cycle": last["cycle"] if last else None,
        "calibration_cycles": len(calib_min),
        "calibration_correlation": _correlation(calib_min),
        "calibration_rows_by_phase": {k: len(v) for k, v in by_phase.items()},
        "calibration_correlation_by_phase": {k: _correlation(v) for k, v in by_phase.items()},
        "calibration_scale": TRUTH_SCALE,
        "notes": "Synthetic data of an invented star for the demo and tests only. Reversals: every sign "
                 "change of the true whole-cap mean |lat| >= cap_latitude_deg; cycles from the 13-month "
                 "smoothed monthly sunspot number; precursor = mean |(north - south)/2| within +-0.5 yr "
                 "of the window centre: the minimum (phase 'minimum', also precursor_at_last_minimum) or "
                 "L years after the cycle's final dipole reversal, the last sign change of the true "
                 "(north - south)/2 before the minimum (phase 'reversal+L'); precursor_at_phase lists the "
                 "phases of the last minimum's cycle whose window lies inside the span; calibration_cycles "
                 "and calibration_correlation are those of the 'minimum' rows; times are decimal years.",
        "generator": {**asdict(settings), "offset_pixels": list(settings.offset_pixels),
                      "star_parameters": _jsonable(asdict(history.params))},
    }


def _correlation(rows: list) -> float | None:
    """Pearson r of precursor and amplitude over calibration rows (None for fewer than three)."""
    if len(rows) <= 2:
        return None
    return pearson_r([r["precursor"] for r in rows], [r["amplitude"] for r in rows])


def _last_cycle_phases(history: StarHistory, landmarks: list, last: dict | None, span_yr: tuple) -> dict:
    """:func:`pipeline.synth.truth.phase_precursors` of the cycle starting at the span's last minimum.

    Only what an observer of the span could measure: the final reversal must lie in the span (else
    None and no ``reversal+L`` phase) and every window inside it.
    """
    if last is None:
        return {"reversal_time": None, "phases": {}}
    k = next(i for i, lm in enumerate(landmarks) if lm["cycle"] == last["cycle"])
    previous = landmarks[k - 1]["minimum_time"] if k > 0 else float(history.time_yr[0])
    previous = max(previous, span_yr[0])  # a reversal before the span is unknown to its observer
    return phase_precursors(history.time_yr, history.dipole_gauss, last["minimum_time"], previous,
                            within_yr=span_yr)


def _jsonable(d):
    if isinstance(d, dict):
        return {k: _jsonable(v) for k, v in d.items()}
    if isinstance(d, (list, tuple)):
        return [_jsonable(v) for v in d]
    if isinstance(d, (np.floating, np.integer)):
        return d.item()
    return d


def _write_csv(path, header, rows) -> None:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(header)
        w.writerows(rows)


def _f(x, fmt="{:.6g}"):
    return "" if x is None or not np.isfinite(x) else fmt.format(x)


def _error_cell(x) -> str:
    """A one-sigma error to 4 decimals; two significant digits when 4 decimals would round it to zero
    (the calibration reader refuses an error that is not positive); blank when unknown."""
    cell = _f(x, "{:.4f}")
    return _f(x, "{:.2g}") if cell and float(cell) == 0.0 else cell


def calibration_csv_text(rows: list) -> str:
    """The archive's ``calibration.csv`` text from :func:`pipeline.synth.truth.calibration_rows`.

    Columns :data:`CALIBRATION_COLUMNS`; precursor and its error in gauss to
    4 decimals, amplitude and its error (sunspot number) to 2; an unknown
    error is a blank cell.  ``pipeline.regression.read_calibration_csv``
    reads it (phase and scale per row).
    """
    import io

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CALIBRATION_COLUMNS)
    w.writerows([[r["cycle"], f"{r['precursor']:.4f}", f"{r['amplitude']:.2f}", _error_cell(r["precursor_error"]),
                  _f(r["amplitude_error"], "{:.2f}"), r["phase"], r["scale"]] for r in rows])
    return buf.getvalue()


def truth_json_text(truth: dict) -> str:
    """The archive's ``truth.json`` text from :func:`truth_summary` (indent 1, trailing newline)."""
    return json.dumps(truth, indent=1) + "\n"


def _write_truth_files(out: Path, history: StarHistory, settings: ArchiveSettings, truth: dict,
                       frame_rows: list) -> None:
    import xarray as xr

    from pipeline.timeutil import iso_time

    y0, y1 = _span_yr(settings)
    ty = history.time_yr
    sel = (ty >= y0) & (ty <= y1)
    times = history.times[sel]
    north, south = history.north_gauss[sel], history.south_gauss[sel]
    _write_csv(out / "truth_caps.csv", ["time", "decimal_year", "north_br_gauss", "south_br_gauss", "dipole_br_gauss"],
               [[iso_time(t), f"{y:.5f}", f"{n:.5f}", f"{s:.5f}", f"{0.5 * (n - s):.5f}"]
                for t, y, n, s in zip(times, ty[sel], north, south)])
    _write_csv(out / "truth_frames.csv", ["file", "time", "north_visible_br_gauss", "south_visible_br_gauss"],
               frame_rows)
    ms = (history.month_mid_yr >= y0) & (history.month_mid_yr <= y1)
    _write_csv(out / "sunspots.csv", ["time", "sunspot_number"],
               [[f"{y:.3f}", f"{r:.1f}"] for y, r in zip(history.month_mid_yr[ms], history.sunspot_observed[ms])])
    with open(out / "calibration.csv", "w", newline="", encoding="utf-8") as fh:
        fh.write(calibration_csv_text(calibration_rows(history, y0)))
    lat = history.grid.latitude_deg[::-1]
    da = xr.DataArray(history.br_gauss[sel][:, ::-1].T.astype(np.float32), dims=("latitude", "time"),
                      coords={"latitude": lat, "time": times}, name="br",
                      attrs={"units": "G", "long_name": "axisymmetric radial field (cell means)"})
    da.latitude.attrs.update(units="degree", long_name="heliographic latitude of cell centre")
    ds = da.to_dataset()
    ds.attrs.update(star=history.params.name, seed=int(history.seed),
                    description="true axisymmetric Br of the synthetic star (flux-transport cell means)")
    with open(out / "truth.json", "w", encoding="utf-8") as fh:
        fh.write(truth_json_text(truth))
    ds.to_netcdf(out / "truth_br.nc", engine="scipy")  # netCDF3: needs only scipy


def write_archive(out_dir, settings: ArchiveSettings, params: StarParameters = StarParameters(),
                  progress=None, only_files=None) -> ArchiveResult:
    """Write the FITS frames and the truth products of one span of the star.

    Parameters
    ----------
    out_dir : str or path-like
        Created if missing.
    settings : ArchiveSettings
    params : StarParameters
    progress : callable, optional
        ``progress(i, n, name)`` after each frame.
    only_files : collection of str, optional
        Write only these frame names (and no truth products): regenerate single frames.

    Returns
    -------
    ArchiveResult
        A frame that fails to write is reported in ``failed`` (name, reason) and the rest carry on.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    history = star_history(int(settings.seed), params)
    times = frame_times(settings.start, settings.end, settings.cadence_days)
    names = [frame_name(t) for t in times]
    if only_files is not None:
        keep = [i for i, n in enumerate(names) if n in set(only_files)]
        times, names = times[keep], [names[i] for i in keep]
    observers = earth_observers(times) if len(times) else []
    written, failed, rows = [], [], []
    for i, (t, name, obs) in enumerate(zip(times, names, observers)):
        try:
            north, south = write_frame_file(out / name, history, t, obs, settings)
        except OSError as exc:
            failed.append((name, f"cannot write: {exc.strerror or exc}"))
            continue
        written.append(name)
        rows.append([name, str(np.datetime64(t, "ms")) + "Z", f"{north:.6f}", f"{south:.6f}"])
        if progress:
            progress(i + 1, len(times), name)
    truth = {}
    if only_files is None:
        truth = truth_summary(history, settings)
        _write_truth_files(out, history, settings, truth, rows)
    return ArchiveResult(str(out), tuple(written), tuple(failed), truth)
