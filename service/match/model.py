"""Reference statistics, posterior over growth families, calibration and novelty.

A *family* is one regime with one parameter set (``dbm`` with ``eta = 2``, ``dla`` with
``sticking = 0.3`` on the Moore neighbourhood, ...), grown at several sizes. Each size is an
ensemble: a mean feature vector and per-feature variances at the ensemble's mean
``log N_eq``. For a specimen of size ``N_eq`` a family's means and variances are
interpolated linearly in ``log N_eq`` between its sizes (small clusters fluctuate more than
large ones), and combined with the family's within-ensemble correlations shrunk towards
those pooled over every family. Everything here reads the families from the reference set's
manifest: no regime or parameter value is named.
"""

from __future__ import annotations

import json
from dataclasses import dataclass

import numpy as np
from scipy import special

from service.errors import LibraryError
from service.match.cache import ReferenceTable

#: Shrinkage weights tried by the leave-one-out calibration (weight on the pooled correlations).
SHRINKAGE_GRID = (0.1, 0.25, 0.4, 0.55, 0.7, 0.85, 0.95)
#: A small ridge (fraction of the pooled variances) keeps every covariance invertible.
VARIANCE_FLOOR = 1e-3
#: Each ensemble's variances are pulled this far towards its family's (sixteen realisations
#: estimate a variance to about 35%).
VARIANCE_POOLING = 0.3
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
class FamilyStatistics:
    """One family's ensembles in order of size, and its correlation matrix.

    Attributes
    ----------
    knots : ndarray, shape (n_sizes,)
        Mean ``log N_eq`` of each ensemble, ascending.
    means, variances : ndarray, shape (n_sizes, k)
        Each ensemble's mean vector and per-feature variance (pulled a little towards the
        family's, ``VARIANCE_POOLING``).
    correlation : ndarray, shape (k, k)
        Within-ensemble correlations of the family, shrunk towards those pooled over
        every family.
    ensemble_ids : ndarray of int
        The ensembles (indices into the set's ensembles) in knot order.
    """

    knots: np.ndarray
    means: np.ndarray
    variances: np.ndarray
    correlation: np.ndarray
    ensemble_ids: np.ndarray


@dataclass(frozen=True, eq=False)
class Statistics:
    """Every family's statistics, and what is pooled over all of them."""

    families: list[FamilyStatistics]
    pooled: np.ndarray  # (k, k) within-ensemble covariance pooled over every family
    floor: np.ndarray  # (k,) variance ridge, VARIANCE_FLOOR of the pooled variances

    @property
    def knots(self) -> list[np.ndarray]:
        return [f.knots for f in self.families]

    @property
    def ensemble_ids(self) -> list[np.ndarray]:
        return [f.ensemble_ids for f in self.families]


def _correlation(covariance: np.ndarray) -> np.ndarray:
    sd = np.sqrt(np.diag(covariance))
    return covariance / np.outer(sd, sd)


def _family_statistics(values, log_sites, ensemble, members, pooled, shrinkage) -> FamilyStatistics:
    """Statistics of one family from its own rows (``values``, ``log_sites``, ``ensemble``).

    An ensemble left with one realisation (when another is held out of a two-realisation
    ensemble) borrows its family's variances, or the pooled ones if the family has no other.
    """
    k = values.shape[1]
    knots, means, variances, counts = [], [], [], []
    scatter, dof = np.zeros((k, k)), 0
    for e in members:
        x = values[ensemble == e]
        mean = x.mean(axis=0)
        residual = x - mean
        scatter += residual.T @ residual
        dof += x.shape[0] - 1
        knots.append(log_sites[ensemble == e].mean())
        means.append(mean)
        variances.append((residual**2).sum(axis=0) / max(x.shape[0] - 1, 1))
        counts.append(x.shape[0])
    family_covariance = scatter / dof if dof > 0 else pooled
    family_variance = np.diag(family_covariance)
    variances = np.array([v if c > 1 else family_variance for v, c in zip(variances, counts)])
    variances = (1.0 - VARIANCE_POOLING) * variances + VARIANCE_POOLING * family_variance
    with np.errstate(invalid="ignore", divide="ignore"):
        own = np.nan_to_num(_correlation(family_covariance), nan=0.0)
    np.fill_diagonal(own, 1.0)
    order = np.argsort(knots, kind="stable")
    return FamilyStatistics(
        knots=np.array(knots)[order],
        means=np.array(means)[order],
        variances=variances[order],
        correlation=(1.0 - shrinkage) * own + shrinkage * _correlation(pooled),
        ensemble_ids=np.asarray(members)[order],
    )


def _statistics(table: ReferenceTable, families: list[Family], shrinkage: float) -> Statistics:
    """Fit every family; the pooled correlations are those of all within-ensemble residuals."""
    counts = np.bincount(table.ensemble)
    if np.any(counts[np.unique(table.ensemble)] < 2):
        raise LibraryError("every reference ensemble needs at least two realisations with features")
    k = table.values.shape[1]
    scatter, dof = np.zeros((k, k)), 0
    for e in np.unique(table.ensemble):
        x = table.values[table.ensemble == e]
        residual = x - x.mean(axis=0)
        scatter += residual.T @ residual
        dof += x.shape[0] - 1
    pooled = scatter / dof
    fitted = [
        _family_statistics(table.values, table.log_sites, table.ensemble, list(f.ensembles), pooled, shrinkage)
        for f in families
    ]
    return Statistics(fitted, pooled, VARIANCE_FLOOR * np.diag(pooled))


def interpolate(knots: np.ndarray, log_sites: float) -> tuple[int, int, float]:
    """Where ``log_sites`` falls among a family's sizes: knots ``i``, ``j`` and the weight
    ``t`` of ``j`` (linear in ``log N_eq`` between neighbouring sizes, held beyond the ends)."""
    if knots.size == 1 or log_sites <= knots[0]:
        return 0, 0, 0.0
    if log_sites >= knots[-1]:
        return knots.size - 1, knots.size - 1, 0.0
    j = int(np.searchsorted(knots, log_sites))
    gap = knots[j] - knots[j - 1]
    return j - 1, j, (0.0 if gap <= 1e-9 else float((log_sites - knots[j - 1]) / gap))


@dataclass(frozen=True, eq=False)
class Evaluation:
    """One feature vector against every family, at the vector's size.

    ``d2`` squared Mahalanobis distances, ``loglik`` Gaussian log-likelihoods, ``mean`` and
    ``sd`` (n_families, k) the interpolated reference means and spreads, ``where`` the
    ``(i, j, t)`` interpolation of each family (see :func:`interpolate`).
    """

    d2: np.ndarray
    loglik: np.ndarray
    mean: np.ndarray
    sd: np.ndarray
    where: list[tuple[int, int, float]]


def _evaluate(statistics: Statistics, values: np.ndarray, log_sites: float,
              replace: tuple[int, FamilyStatistics] | None = None) -> Evaluation:
    """Evaluate ``values`` against every family (``replace`` swaps one family's statistics)."""
    families = list(statistics.families)
    if replace is not None:
        families[replace[0]] = replace[1]
    k = values.size
    mean, variance, where = np.empty((len(families), k)), np.empty((len(families), k)), []
    for f, fam in enumerate(families):
        i, j, t = interpolate(fam.knots, log_sites)
        mean[f] = (1 - t) * fam.means[i] + t * fam.means[j]
        variance[f] = (1 - t) * fam.variances[i] + t * fam.variances[j]
        where.append((i, j, t))
    sd = np.sqrt(variance)
    covariance = np.stack([fam.correlation for fam in families]) * sd[:, :, None] * sd[:, None, :]
    covariance += np.diag(statistics.floor)[None]
    sign, logdet = np.linalg.slogdet(covariance)
    if np.any(sign <= 0):
        raise LibraryError("a reference covariance is not positive definite: a feature does not vary in the library")
    diff = values[None, :] - mean
    d2 = np.einsum("fi,fi->f", diff, np.linalg.solve(covariance, diff[:, :, None])[:, :, 0])
    loglik = -0.5 * d2 - 0.5 * logdet - 0.5 * k * np.log(2 * np.pi)
    spread = np.sqrt(np.diagonal(covariance, axis1=1, axis2=2))
    return Evaluation(d2, loglik, mean, spread, where)


def held_out_scores(
    table: ReferenceTable, families: list[Family], n_ensembles: int, shrinkage: float
) -> tuple[np.ndarray, np.ndarray]:
    """Leave-one-realisation-out squared distances and log-likelihoods, (n_clusters, n_families).

    Strategy: removing one cluster changes only its own family's statistics, so for each
    held-out cluster that family is refitted from its other clusters (a few dozen rows) and
    every other family is used as fitted on everything; the pooled correlations, one
    cluster in hundreds, are kept.
    """
    full = _statistics(table, families, shrinkage)
    family_of = family_index(families, n_ensembles)
    n = table.values.shape[0]
    d2_all = np.empty((n, len(families)))
    ll_all = np.empty((n, len(families)))
    for row in range(n):
        f = int(family_of[table.ensemble[row]])
        keep = np.flatnonzero(family_of[table.ensemble] == f)
        keep = keep[keep != row]
        refit = _family_statistics(
            table.values[keep], table.log_sites[keep], table.ensemble[keep], list(families[f].ensembles),
            full.pooled, shrinkage,
        )
        evaluation = _evaluate(full, table.values[row], float(table.log_sites[row]), replace=(f, refit))
        d2_all[row], ll_all[row] = evaluation.d2, evaluation.loglik
    return d2_all, ll_all


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
        Weight of the pooled correlations in each family's correlations.
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

    def evaluate(self, values: np.ndarray, log_sites: float) -> Evaluation:
        """Distances and log-likelihoods of one vector under every family, at its size."""
        return _evaluate(self.statistics, values, log_sites)


def fit_temperature(loglik: np.ndarray, truth: np.ndarray) -> tuple[float, float]:
    """Temperature minimising the held-out negative log-likelihood of the true families."""
    from scipy import optimize  # only when fitting: a stored model loads without it

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
    from scipy import stats  # only when fitting: a stored model loads without it

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
    from scipy import stats  # only when fitting: a stored model loads without it

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
    statistics = _statistics(table, families, shrinkage)
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
