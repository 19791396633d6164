"""Reference main field (IGRF, through the `ppigrf` package) at a site and date, and a measured-minus-model check.

A main-field model is a first sanity check of a new installation, not a truth: local crustal fields,
nearby iron and the day's external field move a site away from it by tens to hundreds of nT and a
few tenths of a degree. `ppigrf` (pure Python, MIT licence) evaluates the IGRF coefficient files it
ships (IGRF-14 by default, IGRF-13 for comparison) in geodetic coordinates on the WGS-84 ellipsoid.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from functools import lru_cache

import numpy as np

from fieldvane.estimator.geomagnetic import elements
from fieldvane.io.errors import InputError, JobError

MODELS = ("IGRF14", "IGRF13")
# Typical 1-sigma difference between a main-field model and the field at a real site (crustal and
# external fields). Order of magnitude from memory of the WMM technical reports' error models;
# used only to phrase the check, never to correct data.
MODEL_SIGMA = {"F_nT": 150.0, "D_deg": 0.4, "I_deg": 0.2}
CHECK_K = 3.0     # "consistent" when |measured - model| <= 3 combined sigmas (common practice)


@dataclass(frozen=True)
class ReferenceField:
    """Model field at one place and time: X, Y, Z (NED), H, F in nT; D, I in degrees."""

    x_nT: float
    y_nT: float
    z_nT: float
    h_nT: float
    f_nT: float
    d_deg: float
    i_deg: float
    model: str
    utc: float


def _ppigrf():
    """Return (ppigrf, ppigrf.ppigrf), or end the job (exit 1) saying how to install it."""
    try:
        import ppigrf
        from ppigrf import ppigrf as impl
    except ImportError:
        raise JobError("the reference field needs the ppigrf package: pip install 'fieldvane[geo]'") from None
    return ppigrf, impl


def _coefficient_file(model: str) -> str:
    _, impl = _ppigrf()
    if model not in MODELS:
        raise InputError(f"unknown reference model {model!r} (known: {', '.join(MODELS)})", column="model")
    return {"IGRF14": impl.shc_fn_igrf14, "IGRF13": impl.shc_fn_igrf13}[model]


@lru_cache(maxsize=4)
def model_span(model: str = "IGRF14") -> tuple[float, float]:
    """Return the (first, last) POSIX seconds the model's coefficient file covers."""
    _, impl = _ppigrf()

    g, _ = impl.read_shc(_coefficient_file(model))
    first, last = (t.to_pydatetime().replace(tzinfo=timezone.utc) for t in (g.index[0], g.index[-1]))
    return first.timestamp(), last.timestamp()


def reference_field(latitude_deg: float, longitude_deg: float, elevation_m: float, utc: float,
                    model: str = "IGRF14") -> ReferenceField:
    """Return the model's field at a geodetic place (deg, m) and time (POSIX s, UTC).

    elevation_m is used as height above the ellipsoid: a site's height above mean sea level differs
    by the geoid (under ~100 m), which moves the main field by a few nT at most.
    """
    ppigrf, _ = _ppigrf()
    for name, value in (("latitude_deg", latitude_deg), ("longitude_deg", longitude_deg),
                        ("elevation_m", elevation_m), ("utc", utc)):
        if not math.isfinite(value):
            raise InputError("not a finite number", column=name)
    first, last = model_span(model)
    if not first <= utc <= last:
        when = (datetime(1970, 1, 1, tzinfo=timezone.utc) + timedelta(seconds=utc)).date().isoformat()
        raise InputError(f"{when} is outside the {model} model's span "
                         f"({datetime.fromtimestamp(first, timezone.utc).year}-"
                         f"{datetime.fromtimestamp(last, timezone.utc).year})", column="utc")
    when = datetime(1970, 1, 1) + timedelta(seconds=float(utc))        # naive UTC, as ppigrf expects
    east, north, up = ppigrf.igrf(longitude_deg, latitude_deg, elevation_m / 1000.0, when,
                                  coeff_fn=_coefficient_file(model))
    b = np.array([[float(np.ravel(north)[0]), float(np.ravel(east)[0]), -float(np.ravel(up)[0])]])
    el = elements(b)
    return ReferenceField(float(el.x_nT[0]), float(el.y_nT[0]), float(el.z_nT[0]), float(el.h_nT[0]),
                          float(el.f_nT[0]), float(el.d_deg[0]), float(el.i_deg[0]), model, float(utc))


@dataclass(frozen=True)
class ElementCheck:
    """One element of the check: measured (with its 1-sigma), model, difference and combined 1-sigma."""

    name: str            # 'D_deg', 'I_deg' or 'F_nT'
    measured: float
    measured_sigma: float
    model: float
    difference: float    # measured - model (D wrapped to -180..180)
    combined_sigma: float
    consistent: bool     # |difference| <= CHECK_K * combined_sigma


def circular_mean_deg(angles_deg) -> float:
    """Return the circular mean (deg, -180..180] of angles in degrees, ignoring NaN."""
    a = np.radians(np.asarray(angles_deg, float))
    a = a[np.isfinite(a)]
    if a.size == 0:
        return math.nan
    return math.degrees(math.atan2(float(np.mean(np.sin(a))), float(np.mean(np.cos(a)))))


def compare_with_model(d_deg, i_deg, f_nT, sigma_d_deg, sigma_i_deg, sigma_f_nT, site_latitude_deg: float,
                       site_longitude_deg: float, site_elevation_m: float, utc, model: str = "IGRF14"
                       ) -> tuple[ReferenceField, list[ElementCheck]]:
    """Return (model field at the run's middle time, checks of D, I (deg) and F (nT)): run mean minus model.

    Inputs are per-sample arrays (NaN ignored). The measured sigma of each element is the median
    per-sample sigma combined with the scatter's standard error: calibration and attitude errors do
    not average down over a run, so the median per-sample sigma is kept whole. The combined sigma
    adds MODEL_SIGMA (crustal and external fields) in quadrature.
    """
    t = np.asarray(utc, float)
    t = t[np.isfinite(t)]
    if t.size == 0:
        raise InputError("no sample has a UTC time: give the run's start time", column="utc")
    ref = reference_field(site_latitude_deg, site_longitude_deg, site_elevation_m,
                          float(0.5 * (t.min() + t.max())), model)
    checks = []
    for name, values, sigmas, model_value in (("D_deg", d_deg, sigma_d_deg, ref.d_deg),
                                              ("I_deg", i_deg, sigma_i_deg, ref.i_deg),
                                              ("F_nT", f_nT, sigma_f_nT, ref.f_nT)):
        v = np.asarray(values, float)
        v = v[np.isfinite(v)]
        s = np.asarray(sigmas, float)
        s = s[np.isfinite(s)]
        if v.size == 0:
            checks.append(ElementCheck(name, math.nan, math.nan, model_value, math.nan, math.nan, False))
            continue
        if name == "D_deg":
            mean = circular_mean_deg(v)
            spread = np.degrees(np.angle(np.exp(1j * np.radians(v - mean))))
        else:
            mean = float(np.mean(v))
            spread = v - mean
        scatter = float(np.std(spread, ddof=1) / math.sqrt(v.size)) if v.size > 1 else 0.0
        per_sample = float(np.median(s)) if s.size else 0.0
        measured_sigma = math.hypot(per_sample, scatter)
        diff = mean - model_value
        if name == "D_deg":
            diff = (diff + 180.0) % 360.0 - 180.0
        combined = math.hypot(measured_sigma, MODEL_SIGMA[name])
        checks.append(ElementCheck(name, mean, measured_sigma, model_value, diff, combined,
                                   abs(diff) <= CHECK_K * combined))
    return ref, checks
