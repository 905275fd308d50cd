"""Reference statistics, posterior over growth families, calibration and novelty.

A *family* is one regime with one parameter set (``dbm`` with ``eta = 2``, ``dla`` with
``sticking = 0.3`` on the Moore neighbourhood, ...), grown at several sizes. Each size is an
ensemble: a mean feature vector at the ensemble's mean ``log N_eq``. For a specimen of size
``N_eq`` a family's mean is interpolated linearly in ``log N_eq`` between its sizes, and its
covariance is the family's pooled within-ensemble covariance shrunk towards the covariance
pooled over every family. Everything here reads the families from the reference set's
manifest: no regime or parameter value is named.
"""

from __future__ import annotations

import json
from dataclasses import dataclass

import numpy as np
from scipy import optimize, special, stats

from service.errors import LibraryError
from service.match.cache import ReferenceTable

#: Shrinkage weights tried by the leave-one-out calibration (weight on the pooled covariance).
SHRINKAGE_GRID = (0.1, 0.25, 0.4, 0.55, 0.7, 0.85, 0.95)
#: A small ridge (fraction of the pooled variances) keeps every covariance invertible.
VARIANCE_FLOOR = 1e-3
#: ``in_library`` is false beyond this quantile of the chi-square law of the squared
#: Mahalanobis distance (widened if held-out references reach farther, see ``fit_model``).
NOVELTY_QUANTILE = 0.999
#: The threshold is at least this widening of this quantile of the held-out references'
#: distances to their own family.
NOVELTY_REFERENCE_QUANTILE = 0.99
NOVELTY_WIDENING = 1.1
#: A specimen is out of library when its largest connected piece holds a share of its sites
#: this much below the least connected reference (every reference is one aggregate).
CONNECTED_MARGIN = 0.02


@dataclass(frozen=True)
class Family:
    """One regime and parameter set, with the ensembles (sizes) that represent it."""

    regime: str
    parameters: dict
    ensembles: tuple[int, ...]

    @property
    def key(self) -> str:
        return json.dumps([self.regime, self.parameters], sort_keys=True)


def families_of(reference_set) -> list[Family]:
    """Group the set's ensembles by (regime, parameters), in manifest order."""
    grouped: dict[str, Family] = {}
    for index, e in enumerate(reference_set.ensembles):
        parameters = dict(sorted(e.parameters.items()))
        family = Family(e.regime, parameters, ())
        found = grouped.get(family.key, family)
        grouped[family.key] = Family(e.regime, parameters, (*found.ensembles, index))
    return list(grouped.values())


def family_index(families: list[Family], n_ensembles: int) -> np.ndarray:
    """The family of each ensemble, as indices into ``families``."""
    index = np.empty(n_ensembles, dtype=np.int64)
    for f, family in enumerate(families):
        index[list(family.ensembles)] = f
    return index


@dataclass(frozen=True, eq=False)
class Statistics:
    """Per-ensemble means and per-family covariances (shrunk), ready to evaluate."""

    knots: list[np.ndarray]  # per family: mean log N_eq of each ensemble, ascending
    means: list[np.ndarray]  # per family: (n_sizes, k) mean vectors in knot order
    ensemble_ids: list[np.ndarray]  # per family: ensemble indices in knot order
    covariance: np.ndarray  # (n_families, k, k)
    inverse: np.ndarray
    logdet: np.ndarray


def _scatter(table: ReferenceTable, n_ensembles: int):
    """Counts, means, mean log-sizes and within-ensemble scatter matrices per ensemble."""
    k = table.values.shape[1]
    counts = np.bincount(table.ensemble, minlength=n_ensembles).astype(float)
    if np.any(counts < 2):
        raise LibraryError("every reference ensemble needs at least two realisations with features")
    sums = np.zeros((n_ensembles, k))
    np.add.at(sums, table.ensemble, table.values)
    means = sums / counts[:, None]
    log_sizes = np.bincount(table.ensemble, weights=table.log_sites, minlength=n_ensembles) / counts
    residual = table.values - means[table.ensemble]
    scatter = np.zeros((n_ensembles, k, k))
    np.add.at(scatter, table.ensemble, residual[:, :, None] * residual[:, None, :])
    return counts, means, log_sizes, scatter


def _covariances(family_scatter: np.ndarray, family_dof: np.ndarray, shrinkage: float):
    """Family covariances shrunk towards the pooled one, their inverses and log-determinants."""
    pooled = family_scatter.sum(axis=0) / family_dof.sum()
    own = family_scatter / np.maximum(family_dof, 1.0)[:, None, None]
    own[family_dof < 1] = pooled
    covariance = (1.0 - shrinkage) * own + shrinkage * pooled
    covariance += VARIANCE_FLOOR * np.diag(np.diag(pooled))[None]
    sign, logdet = np.linalg.slogdet(covariance)
    if np.any(sign <= 0):
        raise LibraryError("a reference covariance is not positive definite: a feature does not vary in the library")
    return covariance, np.linalg.inv(covariance), logdet


def interpolate(knots: np.ndarray, means: np.ndarray, log_sites: float) -> tuple[np.ndarray, tuple[int, int, float]]:
    """Family mean at ``log_sites``: linear between neighbouring sizes, held beyond the ends.

    Returns the mean and ``(i, j, t)``: the knots used and the weight ``t`` of knot ``j``.
    """
    if knots.size == 1 or log_sites <= knots[0]:
        return means[0], (0, 0, 0.0)
    if log_sites >= knots[-1]:
        return means[-1], (knots.size - 1, knots.size - 1, 0.0)
    j = int(np.searchsorted(knots, log_sites))
    gap = knots[j] - knots[j - 1]
    t = 0.0 if gap <= 1e-9 else float((log_sites - knots[j - 1]) / gap)
    return (1 - t) * means[j - 1] + t * means[j], (j - 1, j, t)


@dataclass(frozen=True, eq=False)
class ReferenceModel:
    """Everything needed to rank a specimen against a reference set.

    Attributes
    ----------
    families : list of Family
    statistics : Statistics
    feature_names : tuple of str
    temperature : float
        Log-likelihoods are divided by this before normalising (fitted on held-out
        references; 1 would trust the Gaussian model as it is).
    shrinkage : float
        Weight of the pooled covariance in each family's covariance.
    novelty_d2 : float
        Squared Mahalanobis distance to the nearest family beyond which a specimen is
        outside the library.
    calibration : dict
        How the temperature, shrinkage and threshold were chosen (for reports).
    size_range : (float, float)
        Smallest and largest mean ``N_eq`` of the reference ensembles.
    min_connected_fraction : float
        The least connected reference: a specimen whose largest piece holds a clearly
        smaller share of its sites than this (``CONNECTED_MARGIN``) is out of library.
    """

    families: list[Family]
    statistics: Statistics
    feature_names: tuple[str, ...]
    temperature: float
    shrinkage: float
    novelty_d2: float
    calibration: dict
    size_range: tuple[float, float]
    min_connected_fraction: float

    def evaluate(self, values: np.ndarray, log_sites: float):
        """Squared Mahalanobis distances and log-likelihoods of one vector under every family.

        Returns ``(d2, loglik, means, interpolation)`` per family.
        """
        return _evaluate(self.statistics, values, log_sites)

    def posterior(self, loglik: np.ndarray) -> np.ndarray:
        """Tempered posterior over families (uniform prior) from their log-likelihoods."""
        return special.softmax(loglik / self.temperature)


def _statistics(table: ReferenceTable, families: list[Family], n_ensembles: int, shrinkage: float) -> Statistics:
    counts, means, log_sizes, scatter = _scatter(table, n_ensembles)
    knots, family_means, ids = [], [], []
    family_scatter = np.zeros((len(families), table.values.shape[1], table.values.shape[1]))
    family_dof = np.zeros(len(families))
    for f, family in enumerate(families):
        members = np.array(family.ensembles)
        order = members[np.argsort(log_sizes[members], kind="stable")]
        knots.append(log_sizes[order])
        family_means.append(means[order])
        ids.append(order)
        family_scatter[f] = scatter[members].sum(axis=0)
        family_dof[f] = (counts[members] - 1).sum()
    covariance, inverse, logdet = _covariances(family_scatter, family_dof, shrinkage)
    return Statistics(knots, family_means, ids, covariance, inverse, logdet)


def _evaluate(statistics: Statistics, values: np.ndarray, log_sites: float):
    n_families = len(statistics.knots)
    mu = np.empty((n_families, values.size))
    where = []
    for f in range(n_families):
        mu[f], used = interpolate(statistics.knots[f], statistics.means[f], log_sites)
        where.append(used)
    diff = values[None, :] - mu
    d2 = np.einsum("fi,fij,fj->f", diff, statistics.inverse, diff)
    loglik = -0.5 * d2 - 0.5 * statistics.logdet - 0.5 * values.size * np.log(2 * np.pi)
    return d2, loglik, mu, where


def held_out_scores(
    table: ReferenceTable, families: list[Family], n_ensembles: int, shrinkage: float
) -> tuple[np.ndarray, np.ndarray]:
    """Leave-one-realisation-out squared distances and log-likelihoods, (n_clusters, n_families).

    Strategy: removing one cluster changes only its own ensemble's mean and its family's
    scatter, by the exact rank-one downdate ``W' = W - c/(c-1) r r^T`` (``r`` its residual
    from the ensemble mean, ``c`` the ensemble's count); the pooled covariance of the other
    families changes by one cluster in hundreds and is kept. So each held-out cluster costs
    one ``k x k`` inverse instead of a refit.
    """
    full = _statistics(table, families, n_ensembles, shrinkage)
    counts, means, log_sizes, scatter = _scatter(table, n_ensembles)
    family_of = family_index(families, n_ensembles)
    family_scatter = np.stack([scatter[list(fam.ensembles)].sum(axis=0) for fam in families])
    family_dof = np.array([(counts[list(fam.ensembles)] - 1).sum() for fam in families])
    pooled_scatter, pooled_dof = family_scatter.sum(axis=0), family_dof.sum()

    n = table.values.shape[0]
    d2_all = np.empty((n, len(families)))
    ll_all = np.empty((n, len(families)))
    for row in range(n):
        e = int(table.ensemble[row])
        f = int(family_of[e])
        c = counts[e]
        x = table.values[row]
        r = x - means[e]
        down = (c / (c - 1.0)) * np.outer(r, r)
        pooled = (pooled_scatter - down) / (pooled_dof - 1)
        own_dof = family_dof[f] - 1
        own = (family_scatter[f] - down) / own_dof if own_dof >= 1 else pooled
        cov = (1.0 - shrinkage) * own + shrinkage * pooled + VARIANCE_FLOOR * np.diag(np.diag(pooled))
        sign, logdet = np.linalg.slogdet(cov)
        inverse = np.linalg.inv(cov)
        position = int(np.flatnonzero(full.ensemble_ids[f] == e)[0])
        family_means = full.means[f].copy()
        family_means[position] = (c * means[e] - x) / (c - 1.0)
        knots = full.knots[f].copy()
        knots[position] = (c * log_sizes[e] - table.log_sites[row]) / (c - 1.0)
        order = np.argsort(knots, kind="stable")
        d2, ll, _, _ = _evaluate(full, x, float(table.log_sites[row]))
        mu, _ = interpolate(knots[order], family_means[order], float(table.log_sites[row]))
        diff = x - mu
        d2[f] = diff @ inverse @ diff
        ll[f] = -0.5 * d2[f] - 0.5 * logdet - 0.5 * x.size * np.log(2 * np.pi)
        d2_all[row], ll_all[row] = d2, ll
    return d2_all, ll_all


def fit_temperature(loglik: np.ndarray, truth: np.ndarray) -> tuple[float, float]:
    """Temperature minimising the held-out negative log-likelihood of the true families."""

    def nll(log_t: float) -> float:
        logp = special.log_softmax(loglik / np.exp(log_t), axis=1)
        return float(-logp[np.arange(truth.size), truth].mean())

    best = optimize.minimize_scalar(nll, bounds=(np.log(0.05), np.log(500.0)), method="bounded")
    return float(np.exp(best.x)), float(best.fun)


def novelty_threshold(own_d2: np.ndarray, n_features: int) -> float:
    """Squared distance beyond which a specimen is out of library.

    The chi-square quantile ``NOVELTY_QUANTILE`` for ``n_features`` degrees of freedom,
    raised to ``NOVELTY_WIDENING`` times the ``NOVELTY_REFERENCE_QUANTILE`` quantile of the
    held-out distances of references to their own family (``own_d2``) when that is farther:
    the references' features have heavier tails than a Gaussian, and about one reference in
    a hundred should be called foreign to its own library, not more. A quantile, not the
    largest distance, so one odd realisation does not open the library to everything.
    """
    empirical = NOVELTY_WIDENING * float(np.quantile(own_d2, NOVELTY_REFERENCE_QUANTILE))
    return max(float(stats.chi2.ppf(NOVELTY_QUANTILE, n_features)), empirical)


def fit_model(reference_set, table: ReferenceTable) -> ReferenceModel:
    """Fit the statistics and calibrate them by leaving one realisation out at a time.

    The shrinkage weight and the temperature are the pair that minimises the held-out
    negative log-likelihood of each cluster's true family (temperature scaling,
    Guo et al. 2017). The novelty threshold is :func:`novelty_threshold` of the held-out
    distances of the references to their own families.

    References
    ----------
    .. [1] C. Guo, G. Pleiss, Y. Sun, K. Q. Weinberger, "On calibration of modern neural
       networks", ICML (2017) (temperature scaling).
    .. [2] O. Ledoit, M. Wolf, "A well-conditioned estimator for large-dimensional
       covariance matrices", J. Multivariate Anal. 88, 365 (2004) (shrinkage).
    """
    families = families_of(reference_set)
    n_ensembles = len(reference_set.ensembles)
    truth = family_index(families, n_ensembles)[table.ensemble]
    trials = []
    for shrinkage in SHRINKAGE_GRID:
        d2, ll = held_out_scores(table, families, n_ensembles, shrinkage)
        temperature, nll = fit_temperature(ll, truth)
        trials.append((nll, shrinkage, temperature, d2, ll))
    nll, shrinkage, temperature, d2, ll = min(trials, key=lambda t: t[0])
    k = table.values.shape[1]
    own = d2[np.arange(truth.size), truth]
    novelty = novelty_threshold(own, k)
    statistics = _statistics(table, families, n_ensembles, shrinkage)
    sizes = np.exp(np.concatenate(statistics.knots))
    return ReferenceModel(
        families=families,
        statistics=statistics,
        feature_names=table.feature_names,
        temperature=temperature,
        shrinkage=shrinkage,
        novelty_d2=novelty,
        calibration={
            "method": "leave-one-realisation-out: shrinkage and temperature minimise the held-out log loss",
            "held_out_log_loss": nll,
            "temperature": temperature,
            "shrinkage": shrinkage,
            "novelty_quantile": NOVELTY_QUANTILE,
            "novelty_chi2_d2": float(stats.chi2.ppf(NOVELTY_QUANTILE, k)),
            "novelty_d2": novelty,
            "held_out_own_family_d2_quantile": float(np.quantile(own, NOVELTY_REFERENCE_QUANTILE)),
            "held_out_family_accuracy": float(np.mean(ll.argmax(axis=1) == truth)),
            "n_references": int(truth.size),
        },
        size_range=(float(sizes.min()), float(sizes.max())),
        min_connected_fraction=float(table.connected_fraction.min()),
    )
