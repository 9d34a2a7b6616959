"""Seeded synthetic polar-field series with known reversals, made in the tests (no file).

Each realisation is a per-rotation north and south cap-mean series of a star
whose polar fields reverse by a front of new polarity that migrates poleward
through the cap, as the surface flux-transport picture has it (common
practice, no source for the shape: a ``tanh`` front in latitude moving at a
constant rate).  On top of the truth come the things that spoil a measured
record: an annual ripple of opposite phase at the two poles (the B0 effect),
AR(1)-correlated noise, white noise, data gaps (one of them sometimes across
a reversal) and, in some realisations, a surge of old polarity that makes a
triple reversal.

The truth's reversal epochs are the persistent crossings of the noiseless,
ripple-free cap mean on a fine grid (the same persistence rule the pipeline
applies; the truth is not smoothed).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.reversal import persistent_crossings

ROTATION_YEARS = 27.2753 / 365.25  # synodic Carrington rotation (common practice, no source)


def _front_cap_mean(t, t_start, travel_years, amplitude_gauss, sign_after, width_deg=6.0, cap_deg=60.0):
    """Area-weighted cap mean (|lat| >= cap) of ``sign * A tanh((front - lat)/w)``, front from cap-10 to 90+10 deg."""
    lat = np.linspace(cap_deg, 90.0, 121)
    w = np.cos(np.radians(lat))
    frac = np.clip((t - t_start) / travel_years, -0.5, 1.5)
    front = (cap_deg - 10.0) + frac * (90.0 - cap_deg + 20.0)
    br = sign_after * amplitude_gauss * np.tanh((front[:, None] - lat[None, :]) / width_deg)
    return (br * w).sum(axis=1) / w.sum()


@dataclass(frozen=True)
class TruthSeries:
    """One realisation: rotation times (decimal years), measured and true north/south (gauss), truth epochs."""

    time: np.ndarray
    north: np.ndarray
    south: np.ndarray
    true_final: dict            # {"north": epoch, "south": epoch, "dipole": epoch}
    n_true_crossings: dict


def _true_pole(t, epochs_start, travel, amp, first_sign, surge=None):
    """Sum of fronts: each cycle's front replaces the previous polarity (a piecewise construction)."""
    out = np.full(t.shape, first_sign * amp)
    sign = first_sign
    for ts in epochs_start:
        sign = -sign
        f = _front_cap_mean(t, ts, travel, amp, sign)
        out = np.where(t >= ts - 0.5 * travel, f, out)
    if surge is not None:
        t0, width, height = surge
        out = out + height * np.exp(-0.5 * ((t - t0) / width) ** 2)
    return out


def make_truth_series(seed: int) -> TruthSeries:
    """One seeded realisation (see the module docstring)."""
    rng = np.random.default_rng(seed)
    t = np.arange(2030.0, 2049.0, ROTATION_YEARS)
    fine = np.arange(2030.0, 2049.0, 0.002)
    travel_n = rng.uniform(1.2, 2.5)
    travel_s = rng.uniform(1.2, 2.5)
    amp_n = rng.uniform(4.0, 9.0)
    amp_s = rng.uniform(4.0, 9.0)
    start1 = rng.uniform(2033.0, 2034.5)
    start2 = start1 + rng.uniform(10.0, 11.5)
    lag = rng.uniform(-1.0, 1.0)  # the south reverses earlier or later
    surge = None
    if rng.uniform() < 0.35:  # a surge of old polarity after the north's last front: a triple reversal
        surge = (start2 + 0.5 * travel_n + rng.uniform(0.5, 0.9), rng.uniform(0.25, 0.35), 0.0)
    first = 1.0 if rng.uniform() < 0.5 else -1.0

    def pole(tt, amp, travel, starts, sign, surge_spec):
        return _true_pole(tt, starts, travel, amp, sign, surge_spec)

    n_surge = None
    if surge is not None:
        # the new polarity after start2 is -first*-1 = first (two fronts): old polarity is -first
        n_surge = (surge[0], surge[1], -first * 1.6 * amp_n)
    true_n = pole(t, amp_n, travel_n, (start1, start2), first, n_surge)
    true_s = pole(t, amp_s, travel_s, (start1 + lag, start2 + lag), -first, None)
    fine_n = pole(fine, amp_n, travel_n, (start1, start2), first, n_surge)
    fine_s = pole(fine, amp_s, travel_s, (start1 + lag, start2 + lag), -first, None)
    fine_d = 0.5 * (fine_n - fine_s)
    truth, counts = {}, {}
    for name, v in (("north", fine_n), ("south", fine_s), ("dipole", fine_d)):
        c = persistent_crossings(fine, v, 0.4)
        truth[name] = c[-1][0] if c else float("nan")
        counts[name] = len(c)

    # measurement: annual ripple of opposite phase (B0), AR(1) noise, white noise
    ripple = rng.uniform(0.1, 0.5) * np.sin(2 * np.pi * (t - 2030.0) + rng.uniform(0, 2 * np.pi))

    def ar1(n, phi, sigma):
        e = rng.normal(0.0, sigma, n)
        out = np.empty(n)
        out[0] = e[0] / np.sqrt(1 - phi * phi)
        for i in range(1, n):
            out[i] = phi * out[i - 1] + e[i]
        return out * np.sqrt(1 - phi * phi)

    phi = rng.uniform(0.3, 0.8)
    sig = rng.uniform(0.2, 0.6)
    white = rng.uniform(0.2, 0.8)
    north = true_n + ripple + ar1(t.size, phi, sig) + rng.normal(0, white, t.size)
    south = true_s - ripple + ar1(t.size, phi, sig) + rng.normal(0, white, t.size)
    # gaps: 1-3 spans of 0.2-0.8 yr; sometimes one across the final north reversal
    for _ in range(rng.integers(1, 4)):
        g0 = rng.uniform(2031.0, 2047.0)
        gap = (t >= g0) & (t < g0 + rng.uniform(0.2, 0.8))
        north[gap] = np.nan
        south[gap] = np.nan
    if rng.uniform() < 0.25:
        g0 = truth["north"] - rng.uniform(0.05, 0.3)
        gap = (t >= g0) & (t < g0 + 0.4)
        north[gap] = np.nan
        south[gap] = np.nan
    return TruthSeries(t, north, south, truth, counts)
