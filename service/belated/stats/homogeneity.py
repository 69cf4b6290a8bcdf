"""Do the label delays of one class differ between score bands? A log-rank test in reverse time.

The arrival curves (`belated.stats.arrival`) are estimated in reverse time, where the
right-truncated delays become left-truncated: a cohort of age a enters the reverse-time risk
sets of the bins it has seen whole, as a late entry does in forward time (Lagakos, Barraj
and De Gruttola 1988, Biometrika 75(3):515-523). Two or more groups (score bands) are then
compared with the K-sample log-rank statistic over the same risk sets: per delay bin b, each
group's labels in b (observed) against d_b R_kb / R_b (expected, R the labels in b or
earlier among the cohorts that have seen b), summed over the bins, with the hypergeometric
covariance d_b (R_b - d_b) / (R_b - 1) (R_kb / R_b) (delta_kl - R_lb / R_b); the quadratic
form of K - 1 groups is chi-square with K - 1 degrees of freedom under homogeneity (Mantel
1966, "Evaluation of survival data and two new rank order statistics arising in its
consideration", Cancer Chemotherapy Reports 50(3):163-170; the formula as in Klein and
Moeschberger 2003, "Survival Analysis", 2nd ed., section 7.3, from memory). With complete
cohorts only it is the ordinary log-rank test on the reversed delays, which
tests/stats/test_homogeneity.py checks against lifelines.

`band_groups` merges the score bands of one class: first adjacent bands until each has
`min_labels` labels (a sparse band joins its neighbour), then, repeatedly, the adjacent pair
whose delays differ least (largest log-rank p-value) while that p-value is above `alpha`.
Groups left are bands whose delays differ from their neighbours'; a single group means the
class's one curve serves every band.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats as sps

from belated.stats.delays import DELAY_EDGES_HOURS

DEFAULT_ALPHA = 0.01
_UPPER = np.asarray(DELAY_EDGES_HOURS[1:], dtype=np.float64)


@dataclass(frozen=True)
class LogRank:
    """A K-sample log-rank test: the statistic, its degrees of freedom and p-value."""

    statistic: float
    df: int
    p_value: float


def _risk_sets(hists: np.ndarray, ages_hours: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(K, bins) events d and risk sets R of each group over the cohorts that saw each bin."""
    seen = _UPPER[None, :] <= (np.asarray(ages_hours, dtype=np.float64)[:, None] - 1.0)
    h = np.asarray(hists, dtype=np.float64)  # (K, cohorts, bins)
    d = np.where(seen[None], h, 0.0).sum(axis=1)
    r = np.where(seen[None], np.cumsum(h, axis=2), 0.0).sum(axis=1)
    return d, r


def logrank_reverse(hists: np.ndarray, ages_hours: np.ndarray) -> LogRank:
    """The K-sample log-rank test in reverse time of `hists` (K groups, cohorts, delay bins)
    of right-truncated delays, cohort ages `ages_hours` as in `fit_arrival`."""
    h = np.asarray(hists, dtype=np.float64)
    if h.ndim != 3 or h.shape[0] < 2:
        raise ValueError("hists must be (groups >= 2, cohorts, bins)")
    return logrank_of(*_risk_sets(h, ages_hours))


def logrank_of(d: np.ndarray, r: np.ndarray) -> LogRank:
    """The K-sample log-rank test from each group's events `d` and risk sets `r` (K, bins).
    Both add up over cohorts and bands, so pooled groups are sums of their parts' rows."""
    k = d.shape[0]
    d_all, r_all = d.sum(axis=0), r.sum(axis=0)
    use = (r_all > 1) & (d_all > 0)
    if not use.any():
        return LogRank(0.0, k - 1, 1.0)
    d, r, d_all, r_all = d[:, use], r[:, use], d_all[use], r_all[use]
    share = r / r_all  # (K, bins)
    observed_minus_expected = (d - d_all * share).sum(axis=1)
    spread = d_all * (r_all - d_all) / (r_all - 1.0)
    cov = np.einsum("b,kb,lb->kl", spread, share, -share)
    cov[np.diag_indices(k)] += (spread * share).sum(axis=1)
    u, v = observed_minus_expected[: k - 1], cov[: k - 1, : k - 1]
    try:
        stat = float(u @ np.linalg.solve(v, u))
    except np.linalg.LinAlgError:
        stat = float(u @ np.linalg.pinv(v) @ u)
    df = int(np.linalg.matrix_rank(v))
    if df == 0 or not np.isfinite(stat):
        return LogRank(0.0, k - 1, 1.0)
    return LogRank(stat, df, float(sps.chi2.sf(stat, df)))


def band_groups(
    band_hists: np.ndarray,
    ages_hours: np.ndarray,
    *,
    min_labels: int,
    alpha: float = DEFAULT_ALPHA,
    extra_labels: np.ndarray | None = None,
) -> list[list[int]]:
    """Contiguous groups of the bands of one class whose delays do not differ.

    `band_hists` (bands, cohorts, delay bins): the class's label delays per band and cohort.
    `extra_labels` (bands): labels a band has beside its histogram (implied negatives), counted
    towards `min_labels`. Bands without labels are left in their neighbours' groups.
    """
    h = np.asarray(band_hists, dtype=np.float64)
    n_bands = h.shape[0]
    d, r = _risk_sets(h, ages_hours)  # per band; a group's are the sums of its bands'
    seen_labels = d.sum(axis=1)
    if extra_labels is not None:
        seen_labels = seen_labels + np.asarray(extra_labels, dtype=np.float64)
    groups: list[list[int]] = []
    for b in range(n_bands):
        if groups and seen_labels[groups[-1]].sum() < min_labels:
            groups[-1].append(b)
        else:
            groups.append([b])
    if len(groups) > 1 and seen_labels[groups[-1]].sum() < min_labels:
        groups[-2].extend(groups.pop())
    while len(groups) > 1:
        p = [
            logrank_of(
                np.stack([d[a].sum(axis=0), d[b].sum(axis=0)]),
                np.stack([r[a].sum(axis=0), r[b].sum(axis=0)]),
            ).p_value
            for a, b in zip(groups[:-1], groups[1:], strict=True)
        ]
        j = int(np.argmax(p))
        if p[j] <= alpha:
            break
        groups[j : j + 2] = [groups[j] + groups[j + 1]]
    return groups
