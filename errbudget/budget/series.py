"""Time series and maps for the report, from what the passes kept (no extra ensemble work).

Bands use the first SERIES_MEMBERS independent draws of the design at up to SERIES_POINTS
times of the case's grid (see :mod:`errbudget.budget.passes`); the nominal curves are two
one-member streaming runs.
"""

from __future__ import annotations

import numpy as np

from errbudget.budget.passes import ReferencePass
from errbudget.case.load import Case
from errbudget.estimates.drivers import most_correlated
from errbudget.solve.ensemble import nominal_params
from errbudget.solve.stream import Readout, stream
from errbudget.solve.trajectory import last_index

NOMINAL_POINTS = 2000  # most points of the accurate nominal run kept for the report
BAND_PERCENTILES = (5.0, 50.0, 95.0)


def series(case: Case, passed: ReferencePass, errors: np.ndarray) -> dict:
    """Ensemble bands, the numerical error along the run, and the nominal curves."""
    times = passed.series_index * case.step
    fine, coarse = passed.series_fine, passed.series_coarse
    with np.errstate(invalid="ignore"):
        gap = np.abs(coarse - fine)
        band = _percentile(fine, BAND_PERCENTILES)
        gap_high = _percentile(gap, 95.0)
    worst = int(np.nanargmax(gap_high)) if np.isfinite(gap_high).any() else 0
    last = last_index(case.horizon, passed.finest_step)
    keep = np.unique(np.linspace(0, last, min(last + 1, NOMINAL_POINTS)).round().astype(int))
    readout = Readout(
        keep={passed.finest_step: keep, case.step: passed.series_index},
        keep_members=np.array([0]),
    )
    accurate, coarse_nominal = stream(
        case, nominal_params(case), [passed.finest_step, case.step], readout=readout
    )
    return {
        "times": times,
        "fine_times": keep * passed.finest_step,
        "band": band,
        "error_p95": gap_high,
        "worst_time": float(times[worst]),
        "worst_error": float(gap_high[worst]) if np.isfinite(gap_high[worst]) else None,
        "nominal_coarse": coarse_nominal.kept[:, 0],
        "nominal_fine": accurate.kept[:, 0],
        "errors": errors,
    }


def _percentile(values: np.ndarray, q) -> np.ndarray:
    """Percentiles over members (axis 1) ignoring NaN; the fast path when there is none."""
    if np.isnan(values).any():
        return np.nanpercentile(values, q, axis=1)
    return np.percentile(values, q, axis=1)


def stability_map(case: Case, sampled: dict, limits: dict, members: np.ndarray) -> dict | None:
    """Per-member step limits against the input they depend on most."""
    stable = np.asarray(limits["stable"], dtype=float)
    if stable.size < 2 or not np.isfinite(stable).any() or not sampled:
        return None
    found = most_correlated(stable, sampled)
    if found is None or found["rho"] == 0:
        return None
    best = found["name"]
    monotone = np.asarray(limits["monotone"], dtype=float)
    return {
        "parameter": best,
        "unit": case.parameters[best].unit,
        "values": sampled[best][members],
        "stable": stable[members],
        "monotone": monotone[members] if monotone.size == stable.size else None,
        "rho": found["rho"],
    }
