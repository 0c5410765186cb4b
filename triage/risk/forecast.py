"""How many drives will fail in the next N days, and how many spares to keep: ``triage forecast``.

Each drive in service at the forecast date has its own probability ``p_i`` of failing within
``days`` (the landmark model, fitted on what was known at that date with a window of ``days``).
The number of failures among a set of drives is then a sum of independent Bernoulli(p_i): a
Poisson-binomial variable. Its distribution is computed exactly, as the coefficients of

    prod_i (1 - p_i + p_i z)

multiplied out over a balanced tree of polynomial products (each product a convolution; long
ones by FFT). Hong (Comput. Stat. Data Anal. 59, 2013) computes the same distribution by the
discrete Fourier transform of its characteristic function; for equal p_i it is the binomial.

* ``expected`` = sum p_i;
* the 90 % prediction interval = the 5 % and 95 % quantiles (smallest k with P(X <= k) >= q);
* ``spares`` = the ``service_level`` quantile: with that many spares on the shelf, the chance of
  running out before the period ends is at most 1 - service_level (for these drives; replacements
  installed during the period can fail too and are not in the count -- say so in the report).

Rows: the whole fleet, each cohort, each site (``rank.site_of`` of the host). Cohort rows add up
to the fleet row in ``drives`` and ``expected``; quantiles do not add (a sum's quantile is not the
sum of quantiles), which is why the fleet row has its own.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np
import pandas as pd
from scipy.signal import fftconvolve

from triage.risk.view import site_of

FORECAST_COLUMNS = ("scope", "name", "drives", "expected", "interval_low", "interval_high", "spares")
INTERVAL = (0.05, 0.95)
#: Above this length a product is done by FFT (np.convolve is exact but quadratic).
_FFT_FROM = 512


def poisson_binomial_pmf(probabilities: Sequence[float]) -> np.ndarray:
    """P(X = k), k = 0..n, for X the number of successes of independent Bernoulli(p_i)."""
    p = np.asarray(probabilities, dtype=float)
    if p.size and (np.any(~np.isfinite(p)) or p.min() < 0 or p.max() > 1):
        raise ValueError("probabilities must lie within [0, 1]")
    polys = [np.array([1.0 - q, q]) for q in p]
    if not polys:
        return np.array([1.0])
    while len(polys) > 1:
        paired = []
        for a, b in zip(polys[0::2], polys[1::2]):
            product = fftconvolve(a, b) if min(len(a), len(b)) > _FFT_FROM else np.convolve(a, b)
            paired.append(np.clip(product, 0.0, None))  # FFT rounding can leave -1e-17
        if len(polys) % 2:
            paired.append(polys[-1])
        polys = paired
    pmf = polys[0]
    return pmf / pmf.sum()


def pmf_quantile(pmf: np.ndarray, q: float) -> int:
    """The smallest k with P(X <= k) >= q."""
    cdf = np.cumsum(pmf)
    return int(min(np.searchsorted(cdf, q - 1e-12, side="left"), len(pmf) - 1))


def summarise(probabilities: np.ndarray, service_level: float) -> dict:
    pmf = poisson_binomial_pmf(probabilities)
    return {"drives": int(len(probabilities)), "expected": float(np.sum(probabilities)),
            "interval_low": pmf_quantile(pmf, INTERVAL[0]), "interval_high": pmf_quantile(pmf, INTERVAL[1]),
            "spares": pmf_quantile(pmf, service_level)}


def forecast_table(drives: pd.DataFrame, service_level: float = 0.95) -> pd.DataFrame:
    """Fleet, cohort and site rows (``FORECAST_COLUMNS``) from ``drives`` (cohort, host, p_fail)."""
    if not 0 < service_level < 1:
        raise ValueError(f"--service-level must lie strictly between 0 and 1, got {service_level}")
    p = drives["p_fail"].to_numpy(dtype=float)
    rows = [{"scope": "fleet", "name": "fleet", **summarise(p, service_level)}]
    for scope, keys in (("cohort", drives["cohort"]), ("site", drives["host"].map(site_of).fillna("site unknown"))):
        for name, index in keys.groupby(keys, sort=True).groups.items():
            rows.append({"scope": scope, "name": str(name),
                         **summarise(p[drives.index.get_indexer(index)], service_level)})
    return pd.DataFrame(rows, columns=list(FORECAST_COLUMNS))


@dataclass
class Forecast:
    rows: pd.DataFrame
    as_of: pd.Timestamp
    days: float
    service_level: float
    drives: pd.DataFrame  # serial, cohort, host, p_fail
    notes: list[str] = field(default_factory=list)


class ForecastError(ValueError):
    """The forecast cannot be made on this store (no captures, no failure known by the date)."""


class ForecastOptionError(ForecastError):
    """An option is out of range (days, service level, a date outside the stored history)."""


def forecast_store(store, days: float = 90, as_of=None, by: Sequence[str] = ("model",),
                   count_proactive: bool = False, service_level: float = 0.95,
                   progress: Callable[[int, int], None] | None = None) -> Forecast:
    """Forecast failures in the ``days`` after ``as_of`` (default: the newest capture) per cohort,
    site and fleet, from data known at ``as_of`` only."""
    from triage.survival.landmark import FitError, store_reader, stored_span, utc  # noqa: PLC0415  (survival, to our left)
    from triage.survival.model import fit_until  # noqa: PLC0415
    from triage.survival.observations import cohort_labels  # noqa: PLC0415

    if not days > 0:
        raise ForecastOptionError(f"--days must be positive, got {days}")
    if not 0 < service_level < 1:
        raise ForecastOptionError(f"--service-level must lie strictly between 0 and 1, got {service_level}")
    span = stored_span(store)
    if span is None:
        raise ForecastError(f"{store.root}: no snapshots stored (run 'triage ingest' first, or check --store)")
    first, last = span
    moment = last if as_of is None else utc(as_of)
    if moment < first + pd.Timedelta(days=14) or moment > last + pd.Timedelta(days=1):
        raise ForecastOptionError(f"--as-of {moment:%Y-%m-%d %H:%M} is outside the stored history "
                            f"({first:%Y-%m-%d} to {last:%Y-%m-%d %H:%M}; the first two weeks only train)")
    removals = store.read("removals", columns=["serial", "removed_at", "reason"])
    try:
        model, states = fit_until(store_reader(store), removals, first, moment, days, by, count_proactive,
                                  progress=progress)
    except FitError as exc:
        raise ForecastError(str(exc)) from None
    if states.empty:
        raise ForecastError(f"no drive was in service at {moment:%Y-%m-%d %H:%M} (none seen in the week before)")
    p = model.predict_proba(states, days)
    known = np.isfinite(p)
    drives = pd.DataFrame({"serial": states["serial"], "cohort": cohort_labels(states, model.by),
                           "host": states["host"], "p_fail": p})[known].reset_index(drop=True)
    notes = []
    if (~known).any():
        notes.append(f"{int((~known).sum())} drive(s) without power-on hours are not in the forecast")
    notes.append("counts cover the drives in service now; replacements installed during the period are not in them")
    return Forecast(rows=forecast_table(drives, service_level), as_of=moment, days=float(days),
                    service_level=service_level, drives=drives, notes=notes)


__all__ = ["FORECAST_COLUMNS", "Forecast", "ForecastError", "ForecastOptionError", "forecast_store", "forecast_table",
           "poisson_binomial_pmf", "pmf_quantile"]
