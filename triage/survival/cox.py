"""Stratified Cox proportional-hazards model on counting-process (episode) rows.

Each row is an interval ``(start, stop]`` of one drive's age during which its covariates ``x``
were constant, with ``event`` set on the row where it failed. The hazard of a drive in stratum
``s`` is ``h_s(t) exp(beta . x(t))`` with a free baseline ``h_s`` per stratum (cohort). The
partial likelihood with Efron's treatment of tied failure ages (Therneau & Grambsch, Modeling
Survival Data, 2000, sections 3.3 and 3.7; Efron, JASA 72, 1977) is

    log L(beta) = sum_s sum_k [ sum_{i in D_k} beta.x_i
                                - sum_{l=0}^{d_k-1} log( R_k - (l / d_k) T_k ) ]

    R_k = sum_{j at risk at t_k} exp(beta.x_j)      at risk: start_j < t_k <= stop_j
    T_k = sum_{i in D_k} exp(beta.x_i)              D_k: the d_k rows failing at t_k

and is maximised by Newton-Raphson with step halving. A small ridge penalty
``- penalizer / 2 * |beta|^2`` keeps a flag that no failing drive ever carried from running off
to minus infinity. Delayed entry needs nothing extra: a drive is simply not in R_k before its
first row starts.

Why not lifelines' time-varying fitter: it rebuilds the risk set by scanning every row at every
failure age (O(failures x rows) per iteration), minutes for a large fleet. Here each row's span
of failure ages ``[a_j, b_j)`` is found once by binary search, and all risk-set sums are
difference arrays over failure ages (O(rows) per iteration). Tests check the result against
lifelines and against Fox's published Rossi coefficients.

Baseline cumulative hazard, per stratum, at the covariate centre (Breslow estimator with the
Efron correction for ties, Therneau & Grambsch 3.7 -- plain Breslow when there are no ties):

    H0_s(t) = sum_{t_k <= t} sum_{l=0}^{d_k-1} 1 / ( R_k - (l / d_k) T_k )
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd


class CoxFitError(ValueError):
    """The data cannot support a Cox fit (no failures, no covariates, bad intervals)."""


@dataclass
class _Stratum:
    name: object
    X: np.ndarray  # centred covariates of the rows
    start_index: np.ndarray  # a_j: first failure-age index with t_k > start_j
    stop_index: np.ndarray  # b_j: failure-age indices below it have t_k <= stop_j
    event_rows: np.ndarray  # row numbers of failing rows
    event_index: np.ndarray  # their failure-age index k
    times: np.ndarray  # unique failure ages t_k
    deaths: np.ndarray  # d_k


def _prepare(start, stop, event, X, strata) -> list[_Stratum]:
    out = []
    for name in pd.unique(strata):
        rows = np.flatnonzero(strata == name)
        s, e, ev = start[rows], stop[rows], event[rows]
        times = np.unique(e[ev])
        if len(times) == 0:
            continue  # a stratum without failures adds nothing to the partial likelihood
        a = np.searchsorted(times, s, side="right")
        b = np.searchsorted(times, e, side="right")
        live = a < b  # rows whose interval holds at least one failure age
        rows, a, b, ev_live = rows[live], a[live], b[live], ev[live]
        e_live = e[live]
        event_rows = np.flatnonzero(ev_live)
        event_index = np.searchsorted(times, e_live[event_rows])
        out.append(_Stratum(name, X[rows], a, b, event_rows, event_index, times,
                            np.bincount(event_index, minlength=len(times))))
    return out


#: Rows whose relative hazards lie within a factor exp(MAGNITUDE_SPAN) are summed together.
MAGNITUDE_SPAN = 8.0


class _RiskSets:
    """Sums over the rows at risk at each failure age t_k, for one stratum at one beta.

    Row j is at risk at t_k for start_index_j <= k < stop_index_j: add its value at its start
    index, subtract it at its stop index, and a cumulative sum gives every risk-set total in
    O(rows + failure ages) (a difference array).

    Done naively over exp(eta) this loses the small terms: once a row with exp(eta) = 1e20 has
    entered and left, the rows still at risk sum to 1e20 - 1e20 + small, i.e. rounding noise,
    which can be zero or negative and wreck the likelihood; and exp(eta) itself overflows or
    underflows for large |eta|. So rows are grouped by magnitude (eta within MAGNITUDE_SPAN of
    each other), each group is summed relative to its own largest eta, and each failure age's
    total is expressed relative to ``level[k]``, the largest eta of any group at risk there:

        sum_{j at risk at t_k} exp(eta_j) w_j = exp(level[k]) * total(w)[k]

    Every term added is then at most 1 in size, and group totals (all of one sign for w > 0)
    are added only after the subtraction that a difference array needs.
    """

    def __init__(self, st: _Stratum, eta: np.ndarray):
        self.st = st
        self.eta = eta
        m = len(st.times)
        bins = np.floor((eta.max() - eta) / MAGNITUDE_SPAN).astype(np.int64) if len(eta) else eta.astype(np.int64)
        _, group = np.unique(bins, return_inverse=True)
        n_groups = int(group.max()) + 1 if len(group) else 1
        top = np.full(n_groups, -np.inf)
        np.maximum.at(top, group, eta)
        self.phi = np.exp(eta - top[group])  # in (e^-SPAN, 1]
        self._offset = group * (m + 1)
        self._shape = (n_groups, m + 1)
        counts = self._group_sums(np.ones(len(eta)))
        present = counts > 0.5
        levels = np.where(present, top[:, None], -np.inf)
        self.level = levels.max(axis=0)  # every t_k has its failing row at risk: finite
        self._scale = np.where(present, np.exp(levels - self.level), 0.0)

    def _group_sums(self, values: np.ndarray) -> np.ndarray:
        size = self._shape[0] * self._shape[1]
        acc = np.bincount(self._offset + self.st.start_index, weights=values, minlength=size)
        acc -= np.bincount(self._offset + self.st.stop_index, weights=values, minlength=size)
        return np.cumsum(acc.reshape(self._shape), axis=1)[:, : self._shape[1] - 1]

    def total(self, weights: np.ndarray | None = None) -> np.ndarray:
        """sum over rows at risk at t_k of exp(eta_j - level[k]) * weights_j, for every k."""
        values = self.phi if weights is None else self.phi * weights
        return (self._group_sums(values) * self._scale).sum(axis=0)

    def at_failures(self, weights: np.ndarray | None = None) -> np.ndarray:
        """The same sum over the rows failing at t_k only (Efron's T_k)."""
        st = self.st
        values = np.exp(self.eta[st.event_rows] - self.level[st.event_index])
        if weights is not None:
            values = values * weights
        return np.bincount(st.event_index, weights=values, minlength=len(st.times))


def _efron_terms(st: _Stratum, beta: np.ndarray, ties: str, hessian: bool = True):
    """Log partial likelihood, gradient and information matrix of one stratum.

    Risk-set sums come from ``_RiskSets`` relative to exp(level[k]); the partial likelihood
    terms are ratios of such sums at the same t_k, so only log L needs level[k] added back.
    """
    X = st.X
    p = X.shape[1]
    eta = X @ beta
    risk = _RiskSets(st, eta)
    m = len(st.times)
    R = risk.total()
    Rx = np.column_stack([risk.total(X[:, j]) for j in range(p)]) if p else np.zeros((m, 0))
    Xd = X[st.event_rows]
    T = risk.at_failures()
    Tx = np.column_stack([risk.at_failures(Xd[:, j]) for j in range(p)]) if p else np.zeros((m, 0))
    # expand failure age k into its d_k Efron terms, fraction c = l / d_k
    d = st.deaths
    k_rep = np.repeat(np.arange(m), d)
    first = np.repeat(np.cumsum(d) - d, d)
    c = (np.arange(len(k_rep)) - first) / d[k_rep] if ties == "efron" else np.zeros(len(k_rep))
    den = R[k_rep] - c * T[k_rep]
    num = Rx[k_rep] - c[:, None] * Tx[k_rep]
    loglik = float(eta[st.event_rows].sum() - (np.log(den) + risk.level[k_rep]).sum())
    gradient = Xd.sum(axis=0) - (num / den[:, None]).sum(axis=0)
    if not hessian:
        return loglik, gradient, None
    info = np.zeros((p, p))
    mean = num / den[:, None]
    for i in range(p):
        for j in range(i, p):
            Rxx = risk.total(X[:, i] * X[:, j])
            Txx = risk.at_failures(Xd[:, i] * Xd[:, j])
            value = ((Rxx[k_rep] - c * Txx[k_rep]) / den).sum() - (mean[:, i] * mean[:, j]).sum()
            info[i, j] = info[j, i] = value
    return loglik, gradient, info


class StratifiedCox:
    """Cox model on (start, stop] rows, stratified, Efron ties; scikit-learn style.

    >>> StratifiedCox().fit(start, stop, event, X, strata).coef_
    """

    def __init__(self, penalizer: float = 0.0, ties: str = "efron", max_iter: int = 50, tol: float = 1e-9):
        if ties not in ("efron", "breslow"):
            raise ValueError("ties must be 'efron' or 'breslow'")
        if penalizer < 0:
            raise ValueError("penalizer must be >= 0")
        self.penalizer = penalizer
        self.ties = ties
        self.max_iter = max_iter
        self.tol = tol

    def fit(self, start, stop, event, X, strata=None, feature_names=None) -> "StratifiedCox":
        start = np.asarray(start, dtype=float)
        stop = np.asarray(stop, dtype=float)
        event = np.asarray(event, dtype=bool)
        X = np.asarray(X, dtype=float)
        if X.ndim != 2 or X.shape[0] != len(start) or len(stop) != len(start) or len(event) != len(start):
            raise CoxFitError("start, stop, event and X must have one row per interval")
        if np.any(~np.isfinite(X)):
            raise CoxFitError("covariates contain NaN or infinite values")
        if np.any(stop <= start):
            raise CoxFitError("every interval needs stop > start")
        strata = np.zeros(len(start), dtype=np.int64) if strata is None else np.asarray(strata, dtype=object)
        if not event.any():
            raise CoxFitError("no failures: the Cox model has nothing to learn from")
        self.feature_names_ = list(feature_names) if feature_names is not None else [f"x{j}" for j in range(X.shape[1])]
        self.center_ = X.mean(axis=0)
        strata_data = _prepare(start, stop, event, X - self.center_, strata)
        p = X.shape[1]
        beta = np.zeros(p)
        loglik, gradient, info = self._evaluate(strata_data, beta)
        self.n_iter_ = 0
        for iteration in range(1, self.max_iter + 1):
            step = np.linalg.solve(info, gradient) if p else np.zeros(0)
            halvings = 0
            while True:
                candidate = beta + step
                new_loglik, new_gradient, new_info = self._evaluate(strata_data, candidate)
                if np.isfinite(new_loglik) and new_loglik >= loglik - 1e-12:
                    break
                if halvings >= 30:  # no step up the likelihood: beta is as good as it gets
                    candidate, new_loglik, new_gradient, new_info = beta, loglik, gradient, info
                    break
                step /= 2
                halvings += 1
            improvement = new_loglik - loglik
            beta, loglik, gradient, info = candidate, new_loglik, new_gradient, new_info
            self.n_iter_ = iteration
            if abs(improvement) < self.tol * max(1.0, abs(loglik)) or np.max(np.abs(step), initial=0) < 1e-10:
                break
        self.coef_ = beta
        self.log_likelihood_ = loglik  # penalized
        self.variance_ = np.linalg.inv(info) if p else np.zeros((0, 0))
        self.se_ = np.sqrt(np.diag(self.variance_))
        self.baseline_ = self._baseline(strata_data, beta)
        self.n_failures_ = int(event.sum())
        self.n_rows_ = len(start)
        return self

    def _evaluate(self, strata_data, beta):
        p = len(beta)
        loglik, gradient, info = 0.0, np.zeros(p), np.zeros((p, p))
        for st in strata_data:
            ll, g, h = _efron_terms(st, beta, self.ties)
            loglik += ll
            gradient += g
            info += h
        # ridge: -penalizer/2 |beta|^2
        loglik -= self.penalizer / 2 * float(beta @ beta)
        gradient = gradient - self.penalizer * beta
        info = info + self.penalizer * np.eye(p)
        return loglik, gradient, info

    def _baseline(self, strata_data, beta) -> dict:
        """{stratum: (failure ages, H0 at those ages)} at the covariate centre."""
        out = {}
        for st in strata_data:
            eta = st.X @ beta
            risk = _RiskSets(st, eta)
            m = len(st.times)
            R, T = risk.total(), risk.at_failures()  # both relative to exp(level[k])
            d = st.deaths
            k_rep = np.repeat(np.arange(m), d)
            first = np.repeat(np.cumsum(d) - d, d)
            c = (np.arange(len(k_rep)) - first) / d[k_rep] if self.ties == "efron" else np.zeros(len(k_rep))
            jumps = np.bincount(k_rep, weights=np.exp(-risk.level[k_rep]) / (R[k_rep] - c * T[k_rep]),
                                minlength=m)
            out[st.name] = (st.times.copy(), np.cumsum(jumps))
        return out

    def relative_hazard(self, X) -> np.ndarray:
        """exp(beta . (x - centre)): hazard relative to a drive at the covariate centre."""
        X = np.asarray(X, dtype=float)
        return np.exp((X - self.center_) @ self.coef_)

    def summary(self) -> pd.DataFrame:
        z = 1.959963984540054
        return pd.DataFrame({
            "coef": self.coef_, "se": self.se_, "hazard_ratio": np.exp(self.coef_),
            "hazard_ratio_low": np.exp(self.coef_ - z * self.se_),
            "hazard_ratio_high": np.exp(self.coef_ + z * self.se_),
        }, index=pd.Index(self.feature_names_, name="covariate"))


def concordance_counting(start, stop, event, score, strata=None, max_levels: int = 512) -> float:
    """Harrell's concordance for (start, stop] rows: at each failure, the failing drive against
    every other row at risk in its stratum at that age (higher score should fail first; equal
    scores count one half). The same pairs R's survival::concordance uses for counting-process
    data. Scores are binned into at most ``max_levels`` quantile levels per stratum, so it is
    exact when a stratum has fewer distinct scores and very close otherwise.
    """
    start = np.asarray(start, dtype=float)
    stop = np.asarray(stop, dtype=float)
    event = np.asarray(event, dtype=bool)
    score = np.asarray(score, dtype=float)
    strata = np.zeros(len(start)) if strata is None else np.asarray(strata, dtype=object)
    concordant = discordant = tied = 0.0
    for name in pd.unique(strata):
        rows = strata == name
        s, e, ev, sc = start[rows], stop[rows], event[rows], score[rows]
        times = np.unique(e[ev])
        if len(times) == 0:
            continue
        levels = np.unique(sc)
        if len(levels) > max_levels:
            levels = np.unique(np.quantile(sc, np.linspace(0, 1, max_levels)))
        level = np.clip(np.searchsorted(levels, sc, side="right") - 1, 0, len(levels) - 1)
        a = np.searchsorted(times, s, side="right")
        b = np.searchsorted(times, e, side="right")
        live = a < b
        m, u = len(times), len(levels)
        grid = np.zeros((m + 1, u))
        np.add.at(grid, (a[live], level[live]), 1.0)
        np.add.at(grid, (b[live], level[live]), -1.0)
        at_risk = np.cumsum(grid, axis=0)[:m]  # rows at risk at t_k with score level v
        below = np.cumsum(at_risk, axis=1) - at_risk  # strictly lower level
        k = np.searchsorted(times, e[ev])
        lv = level[ev]
        # rows failing at the same age are not comparable with each other (Harrell)
        same_time = np.zeros((m, u))
        np.add.at(same_time, (k, lv), 1.0)
        same_below = np.cumsum(same_time, axis=1) - same_time
        total = at_risk.sum(axis=1)
        same_total = same_time.sum(axis=1)
        n_below = below[k, lv] - same_below[k, lv]
        n_equal = at_risk[k, lv] - same_time[k, lv]
        n_above = (total[k] - same_total[k]) - n_below - n_equal
        concordant += n_below.sum()
        discordant += n_above.sum()
        tied += n_equal.sum()
    pairs = concordant + discordant + tied
    return float((concordant + 0.5 * tied) / pairs) if pairs else float("nan")
