"""Reference statistics, posterior over growth families, calibration and novelty.

A *family* is one regime with one parameter set (``dbm`` with ``eta = 2``, ``dla`` with
``sticking = 0.3`` on the Moore neighbourhood, ...), grown at several sizes and each cluster
drawn in several styles (:mod:`service.match.nuisance`). A family's mean feature vector and
per-feature variances are kernel-weighted local linear fits on ``log N_eq`` over all its
drawings, so the variance holds what differs between realisations and what the drawing
style changes alike (small clusters fluctuate more than large ones, and a thick drawing has
fewer sites than a thin one of the same cluster); they are combined with the family's
correlations shrunk towards those pooled over every family. Everything here reads the families from the reference set's
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
#: A parameter interval reaches on both sides at least this quantile of how far drawing style
#: alone moved the estimates of held-out references (the range over one cluster's drawings).
#: At 0.95, one DLA cluster in our drawing-style check (drawn two sites thick) still fell outside;
#: a 95% interval claims to hold the truth whatever the camera did, so nearly every cluster's
#: spread must fit inside it.
PARAMETER_RANGE_QUANTILE = 0.99
#: The bulk of the references: this quantile of their held-out squared distances to their
#: own family. Beyond it the posterior is tempered in proportion to the distance.
INLIER_QUANTILE = 0.9
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
    """One family's mean and spread as smooth functions of size, and its correlation matrix.

    Attributes
    ----------
    knots : ndarray, shape (n_knots,)
        ``log N_eq`` values, evenly spaced over the family's rows, where the local fits are kept.
    means, variances : ndarray, shape (n_knots, k)
        Kernel-weighted local linear fit of the features on ``log N_eq`` at each knot, and the
        weighted variance of the rows about it (between realisations and drawing styles at
        once), pulled a little towards the family's average (``VARIANCE_POOLING``).
    correlation : ndarray, shape (k, k)
        Correlations of the family's standardised residuals, shrunk towards those pooled over
        every family.
    ensemble_ids : ndarray of int
        The family's ensembles (indices into the set's ensembles), by size.
    ensemble_knots : ndarray
        Mean ``log N_eq`` of each of those ensembles' rows.
    own_correlation : ndarray, shape (k, k)
        The family's correlations before shrinkage.
    components : tuple of FamilyStatistics
        The same fits made on the drawings of each branch thickness alone. The likelihood is
        the equal mixture of these (the thickness of a specimen's branches, in sites, is
        unknown), so a thick drawing is compared with thick drawings of every family;
        empty when the rows carry one thickness only (then the overall fit is used).
    """

    knots: np.ndarray
    means: np.ndarray
    variances: np.ndarray
    correlation: np.ndarray
    ensemble_ids: np.ndarray
    ensemble_knots: np.ndarray
    own_correlation: np.ndarray
    components: tuple = ()

    def at(self, log_sites: float) -> tuple[np.ndarray, np.ndarray]:
        """Mean and variance at a size (linear between knots, held beyond the ends)."""
        i, j, t = interpolate(self.knots, log_sites)
        return (1 - t) * self.means[i] + t * self.means[j], (1 - t) * self.variances[i] + t * self.variances[j]

    def with_shrinkage(self, pooled_correlation: np.ndarray, shrinkage: float) -> "FamilyStatistics":
        return FamilyStatistics(
            self.knots, self.means, self.variances,
            (1.0 - shrinkage) * self.own_correlation + shrinkage * pooled_correlation,
            self.ensemble_ids, self.ensemble_knots, self.own_correlation,
            tuple(c.with_shrinkage(pooled_correlation, shrinkage) for c in self.components),
        )


@dataclass(frozen=True, eq=False)
class Statistics:
    """Every family's statistics, and what is pooled over all of them."""

    families: list[FamilyStatistics]
    pooled: np.ndarray  # (k, k) covariance: pooled correlations scaled by the families' mean variances
    floor: np.ndarray  # (k,) variance ridge, VARIANCE_FLOOR of the mean variances
    pooled_correlation: np.ndarray  # (k, k) correlation of standardised residuals over every family

    @property
    def knots(self) -> list[np.ndarray]:
        return [f.ensemble_knots for f in self.families]

    @property
    def ensemble_ids(self) -> list[np.ndarray]:
        return [f.ensemble_ids for f in self.families]


#: Bandwidth (standard deviation of the Gaussian kernel, in ``ln N_eq``) of the local fits
#: on size: the library's sizes are a factor 3 apart (1.1 in ``ln``) and the drawing styles
#: spread one cluster's ``N_eq`` over a factor of about 4.
BANDWIDTH_LOG_SITES = 0.45
#: Knots of the local fits per family.
N_KNOTS = 24
#: Model each family as an equal mixture over the drawing thicknesses (see
#: ``FamilyStatistics.components``) rather than one Gaussian holding their spread.
THICKNESS_MIXTURE = True


def _local_fit(values: np.ndarray, log_sites: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Knots, local linear means and residual variances of one family's rows.

    Strategy: at each knot the rows are weighted by a Gaussian kernel in ``log N_eq``; the
    weighted least-squares line through them gives the mean at the knot, and the weighted
    mean of the squared residuals about that line, corrected for the two fitted
    coefficients with the kernel's effective number of rows, gives the variance. A cluster
    drawn thick has fewer sites than the same cluster drawn thin, so the line absorbs what
    the drawing changes together with the size, and the residual keeps the rest.
    """
    lo, hi = float(log_sites.min()), float(log_sites.max())
    knots = np.linspace(lo, hi, N_KNOTS) if hi - lo > 1e-9 else np.array([lo])
    d = log_sites[None, :] - knots[:, None]
    w = np.exp(-0.5 * (d / BANDWIDTH_LOG_SITES) ** 2)
    s0, s1, s2 = w.sum(1), (w * d).sum(1), (w * d * d).sum(1)
    t0, t1 = w @ values, (w * d) @ values
    det = s0 * s2 - s1**2
    flat = det <= 1e-12 * np.maximum(s0 * s2, 1e-300)
    safe = np.where(flat, 1.0, det)
    b0 = np.where(flat[:, None], t0 / s0[:, None], (s2[:, None] * t0 - s1[:, None] * t1) / safe[:, None])
    b1 = np.where(flat[:, None], 0.0, (s0[:, None] * t1 - s1[:, None] * t0) / safe[:, None])
    residual = values[None, :, :] - b0[:, None, :] - b1[:, None, :] * d[:, :, None]
    n_eff = s0**2 / (w**2).sum(1)
    correction = n_eff / np.maximum(n_eff - 2.0, 1.0)
    variances = np.einsum("kn,knf->kf", w, residual**2) / s0[:, None] * correction[:, None]
    return knots, b0, variances


def _family_fit(values, log_sites, ensemble, members, style=None) -> FamilyStatistics:
    """A family's local fits and own correlations (shrinkage applied later), with one
    component per drawing thickness when ``style`` (each row's thickness level) is given."""
    knots, means, variances = _local_fit(values, log_sites)
    variances = (1.0 - VARIANCE_POOLING) * variances + VARIANCE_POOLING * variances.mean(axis=0)
    fitted = FamilyStatistics(knots, means, variances, np.eye(values.shape[1]), np.array([]), np.array([]),
                              np.eye(values.shape[1]))
    z = _standardised_residuals(fitted, values, log_sites)
    own = (z.T @ z) / max(z.shape[0] - 1, 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        own = np.nan_to_num(_correlation(own), nan=0.0)
    np.fill_diagonal(own, 1.0)
    present = [e for e in members if np.any(ensemble == e)]
    sizes = np.array([log_sites[ensemble == e].mean() for e in present])
    order = np.argsort(sizes, kind="stable")
    components = ()
    if THICKNESS_MIXTURE and style is not None and np.unique(style).size > 1:
        components = tuple(
            _family_fit(values[style == level], log_sites[style == level], ensemble[style == level], members)
            for level in np.unique(style)
        )
    return FamilyStatistics(knots, means, variances, own, np.asarray(present)[order], sizes[order], own, components)


def _at_many(family: FamilyStatistics, log_sites: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Means and variances (n, k) of a family at many sizes (as :meth:`FamilyStatistics.at`)."""
    knots = family.knots
    if knots.size == 1:
        return np.broadcast_to(family.means[0], (log_sites.size, family.means.shape[1])), \
            np.broadcast_to(family.variances[0], (log_sites.size, family.variances.shape[1]))
    position = np.clip(log_sites, knots[0], knots[-1])
    j = np.clip(np.searchsorted(knots, position), 1, knots.size - 1)
    t = ((position - knots[j - 1]) / (knots[j] - knots[j - 1]))[:, None]
    mean = (1 - t) * family.means[j - 1] + t * family.means[j]
    variance = (1 - t) * family.variances[j - 1] + t * family.variances[j]
    return mean, variance


def _standardised_residuals(family: FamilyStatistics, values, log_sites) -> np.ndarray:
    """Each row's residual from the family's mean at its size, in the family's spreads there."""
    mean, variance = _at_many(family, np.asarray(log_sites, dtype=float))
    sd = np.sqrt(variance)
    # A feature that does not vary in a family (no enclosed pores in any compact drawing,
    # say) has no standardised residual: zero, not NaN.
    return np.divide(values - mean, sd, out=np.zeros(np.broadcast_shapes(values.shape, sd.shape)), where=sd > 0)


def _evaluate_many(families: list[FamilyStatistics], floor: np.ndarray, values: np.ndarray,
                   log_sites: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Squared distances and log-likelihoods (n, n_families) of many rows at once."""
    n, k = values.shape
    d2 = np.empty((n, len(families)))
    loglik = np.empty((n, len(families)))
    for f, fam in enumerate(families):
        if fam.components:
            # Equal mixture over the drawing thicknesses; the distance is the nearest component's.
            d2_c, ll_c = _evaluate_many(list(fam.components), floor, values, log_sites)
            loglik[:, f] = special.logsumexp(ll_c, axis=1) - np.log(len(fam.components))
            d2[:, f] = d2_c.min(axis=1)
            continue
        mean, variance = _at_many(fam, log_sites)
        sd = np.sqrt(variance)
        covariance = fam.correlation[None] * sd[:, :, None] * sd[:, None, :] + np.diag(floor)[None]
        sign, logdet = np.linalg.slogdet(covariance)
        if np.any(sign <= 0):
            raise LibraryError("a reference covariance is not positive definite: a feature does not vary in the library")
        diff = values - mean
        d2[:, f] = np.einsum("ni,ni->n", diff, np.linalg.solve(covariance, diff[:, :, None])[:, :, 0])
        loglik[:, f] = -0.5 * d2[:, f] - 0.5 * logdet - 0.5 * k * np.log(2 * np.pi)
    return d2, loglik


def _correlation(covariance: np.ndarray) -> np.ndarray:
    sd = np.sqrt(np.diag(covariance))
    return covariance / np.outer(sd, sd)


def _fit_families(table: ReferenceTable, families: list[Family]) -> tuple[list[FamilyStatistics], np.ndarray]:
    """Every family's own fit and the correlations pooled over all of them."""
    counts = np.bincount(table.ensemble)
    clusters_per_ensemble = np.array([
        np.unique(table.realisation[table.ensemble == e]).size for e in range(counts.size)
    ])
    if np.any(clusters_per_ensemble[np.unique(table.ensemble)] < 2):
        raise LibraryError("every reference ensemble needs at least two realisations with features")
    family_of = family_index(families, int(table.ensemble.max()) + 1)
    fits, residuals = [], []
    for f, family in enumerate(families):
        rows = family_of[table.ensemble] == f
        fit = _family_fit(table.values[rows], table.log_sites[rows], table.ensemble[rows], list(family.ensembles),
                          table.style[rows])
        fits.append(fit)
        residuals.append(_standardised_residuals(fit, table.values[rows], table.log_sites[rows]))
    z = np.concatenate(residuals)
    pooled = _correlation((z.T @ z) / max(z.shape[0] - 1, 1))
    return fits, pooled


def _statistics(table: ReferenceTable, families: list[Family], shrinkage: float,
                fitted: tuple[list[FamilyStatistics], np.ndarray] | None = None) -> Statistics:
    """Fit every family (or reuse ``fitted``) and shrink its correlations towards the pooled ones."""
    fits, pooled = fitted if fitted is not None else _fit_families(table, families)
    variance = np.mean([f.variances.mean(axis=0) for f in fits], axis=0)
    sd = np.sqrt(variance)
    return Statistics(
        [f.with_shrinkage(pooled, shrinkage) for f in fits], pooled * np.outer(sd, sd), VARIANCE_FLOOR * variance,
        pooled,
    )


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
    ``sd`` (n_families, k) the reference means and spreads at the vector's size, ``where``
    the ``(i, j, t)`` interpolation between each family's ensembles (see :func:`interpolate`).
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
        mean[f], variance[f] = fam.at(log_sites)
        where.append(interpolate(fam.ensemble_knots, log_sites))
    spread = np.sqrt(variance + statistics.floor[None, :])
    d2, loglik = _evaluate_many(families, statistics.floor, values[None, :], np.array([log_sites]))
    return Evaluation(d2[0], loglik[0], mean, spread, where)


def _held_out_refits(table: ReferenceTable, families: list[Family], n_ensembles: int):
    """For each cluster, its family refitted without any of the cluster's drawings."""
    family_of = family_index(families, n_ensembles)
    cluster = table.cluster
    refits = {}
    for c in np.unique(cluster):
        rows = np.flatnonzero(cluster == c)
        f = int(family_of[table.ensemble[rows[0]]])
        keep = np.flatnonzero((family_of[table.ensemble] == f) & (cluster != c))
        refits[int(c)] = (f, rows, _family_fit(
            table.values[keep], table.log_sites[keep], table.ensemble[keep], list(families[f].ensembles),
            table.style[keep],
        ))
    return refits


def held_out_scores(
    table: ReferenceTable, families: list[Family], n_ensembles: int, shrinkage: float, *, _cache: dict | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Leave-one-cluster-out squared distances and log-likelihoods, (n_rows, n_families).

    Strategy: a cluster is held out with every drawing of it (its drawings share its
    growth, so another drawing left in would give the answer away). Removing it changes
    only its own family's statistics, so that family is refitted from its other clusters
    and every other family is used as fitted on everything; the pooled correlations, one
    cluster in hundreds, are kept.
    """
    cache = _cache if _cache is not None else {}
    if "fitted" not in cache:
        cache["fitted"] = _fit_families(table, families)
        cache["refits"] = _held_out_refits(table, families, n_ensembles)
    full = _statistics(table, families, shrinkage, cache["fitted"])
    pooled = cache["fitted"][1]
    d2_all, ll_all = _evaluate_many(full.families, full.floor, table.values, table.log_sites)
    for f, rows, refit in cache["refits"].values():
        d2, ll = _evaluate_many([refit.with_shrinkage(pooled, shrinkage)], full.floor, table.values[rows],
                                table.log_sites[rows])
        d2_all[rows, f], ll_all[rows, f] = d2[:, 0], ll[:, 0]
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
    inlier_d2: float = 0.0
    nuisance_log_odds_sd: float = 0.0
    parameter_nuisance_range: dict = None  # {(regime, parameter): range on its axis}

    def evaluate(self, values: np.ndarray, log_sites: float) -> Evaluation:
        """Distances and log-likelihoods of one vector under every family, at its size."""
        return _evaluate(self.statistics, values, log_sites)

    def posterior(self, evaluation: Evaluation) -> "Posterior":
        """Family probabilities of an evaluated specimen, tempered by its distance from the references.

        Within the bulk of the references (nearest squared distance up to ``inlier_d2``) the
        log-likelihoods are divided by the calibrated ``temperature``. Farther out the model's
        Gaussian tails are not trusted: the temperature grows in proportion to the nearest
        squared distance, so the log-likelihood ratios keep the size they have at the edge
        of the references. Beyond the novelty threshold the evidence that the specimen
        belongs to any family at all fades: the probabilities are mixed with equal odds
        over the families with weight ``1 - novelty_d2 / d2``, so a specimen outside the
        library never gets a probability near one.
        """
        nearest_d2 = float(np.min(evaluation.d2))
        stretch = max(1.0, nearest_d2 / self.inlier_d2) if self.inlier_d2 > 0 else 1.0
        temperature = self.temperature * stretch
        scaled = evaluation.loglik / temperature
        tempered = special.softmax(scaled)
        probability = tempered
        outside = max(0.0, 1.0 - self.novelty_d2 / nearest_d2) if nearest_d2 > self.novelty_d2 else 0.0
        if outside > 0:
            probability = (1.0 - outside) * tempered + outside / tempered.size
        return Posterior(probability, float(temperature), float(stretch), float(outside), tempered)


@dataclass(frozen=True, eq=False)
class Posterior:
    """Family probabilities and how they were tempered (see :meth:`ReferenceModel.posterior`)."""

    probability: np.ndarray
    temperature: float
    stretch: float
    outside_weight: float
    tempered: np.ndarray  # before the equal-odds mixing: where the parameters lie within a regime

    @property
    def log_probability(self) -> np.ndarray:
        return np.log(np.maximum(self.probability, 1e-300))


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
    """Fit the statistics and calibrate them by leaving one cluster (all its drawings) out at a time.

    The shrinkage weight and the temperature are the pair that minimises the held-out
    negative log-likelihood of each drawing's true family (temperature scaling,
    Guo et al. 2017). The novelty threshold is :func:`novelty_threshold` of the held-out
    distances of the references to their own families; the distance tempering starts at
    their ``INLIER_QUANTILE`` quantile; the nuisance spread of a verdict's log-odds is
    :func:`nuisance_log_odds_sd` of the held-out drawings.

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
    trials, cache = [], {}
    for shrinkage in SHRINKAGE_GRID:
        d2, ll = held_out_scores(table, families, n_ensembles, shrinkage, _cache=cache)
        temperature, nll = fit_temperature(ll, truth)
        trials.append((nll, shrinkage, temperature, d2, ll))
    nll, shrinkage, temperature, d2, ll = min(trials, key=lambda t: t[0])
    k = table.values.shape[1]
    own = d2[np.arange(truth.size), truth]
    novelty = novelty_threshold(own, k)
    statistics = _statistics(table, families, shrinkage, cache["fitted"])
    sizes = np.exp(np.concatenate(statistics.knots))
    nuisance_sd = nuisance_log_odds_sd(ll / temperature, truth, families, table.cluster)
    parameter_spread = parameter_nuisance_range(ll / temperature, truth, families, table.cluster)
    return ReferenceModel(
        families=families,
        statistics=statistics,
        feature_names=table.feature_names,
        temperature=temperature,
        shrinkage=shrinkage,
        novelty_d2=novelty,
        calibration={
            "method": (
                "leave-one-cluster-out (every drawing of a cluster held out together): shrinkage and "
                "temperature minimise the held-out log loss"
            ),
            "held_out_log_loss": nll,
            "temperature": temperature,
            "shrinkage": shrinkage,
            "novelty_quantile": NOVELTY_QUANTILE,
            "novelty_chi2_d2": float(stats.chi2.ppf(NOVELTY_QUANTILE, k)),
            "novelty_d2": novelty,
            "held_out_own_family_d2_quantile": float(np.quantile(own, NOVELTY_REFERENCE_QUANTILE)),
            "held_out_family_accuracy": float(np.mean(ll.argmax(axis=1) == truth)),
            "n_references": int(truth.size),
            "n_clusters": int(np.unique(table.cluster).size),
            "inlier_d2": float(np.quantile(own, INLIER_QUANTILE)),
            "nuisance_log_odds_sd": nuisance_sd,
            "parameter_nuisance_range": {f"{r}.{n}": v for (r, n), v in parameter_spread.items()},
        },
        size_range=(float(sizes.min()), float(sizes.max())),
        min_connected_fraction=float(table.connected_fraction.min()),
        inlier_d2=float(np.quantile(own, INLIER_QUANTILE)),
        nuisance_log_odds_sd=nuisance_sd,
        parameter_nuisance_range=parameter_spread,
    )


def parameter_nuisance_range(scaled_loglik: np.ndarray, truth: np.ndarray, families: list[Family],
                             cluster: np.ndarray) -> dict[tuple[str, str], float]:
    """How far the drawing style alone moves each parameter's estimate, on its axis.

    For every held-out drawing, the parameter is estimated from the posterior within the
    true regime (:func:`service.match.parameters.interval_estimate`); for each cluster drawn
    at every thickness level the estimates' range (largest minus smallest, on the
    parameter's axis: logarithmic for sticking) is what the camera changes. The
    ``PARAMETER_RANGE_QUANTILE`` quantile of those ranges is returned per (regime, parameter):
    a 95% interval must hold what the camera does to nearly every cluster, not to the average one.
    """
    from service.match.parameters import estimate_on_axis, numeric_grid

    out = {}
    logp = special.log_softmax(scaled_loglik, axis=1)
    for regime in dict.fromkeys(f.regime for f in families):
        members = [i for i, f in enumerate(families) if f.regime == regime]
        rows = np.flatnonzero(np.isin(truth, members))
        for name, values, axis in numeric_grid([families[i] for i in members]):
            estimates = np.array([
                estimate_on_axis(values, np.exp(logp[r, members] - logp[r, members].max()), axis) for r in rows
            ])
            ranges = []
            for c in np.unique(cluster[rows]):
                own = estimates[cluster[rows] == c]
                if own.size >= 4:
                    ranges.append(float(own.max() - own.min()))
            if ranges:
                out[(regime, name)] = float(np.quantile(ranges, PARAMETER_RANGE_QUANTILE))
    return out


def nuisance_log_odds_sd(scaled_loglik: np.ndarray, truth: np.ndarray, families: list[Family],
                         cluster: np.ndarray) -> float:
    """How far the drawing style alone moves the log-odds of a verdict.

    For every held-out drawing, the tempered log-odds of its true verdict (universality class
    or regime, :func:`service.match.universality.verdict_of`) against the best other one,
    clipped to +-ln 99 (beyond that the verdict is not in doubt); the standard deviation of
    these log-odds among the drawings of one cluster is what the camera changes, and the
    root mean square over clusters is returned.
    """
    from service.match.universality import verdict_of

    verdicts = [verdict_of(f.regime, f.parameters) for f in families]
    names = list(dict.fromkeys(verdicts))
    member = np.array([[v == name for v in verdicts] for name in names])  # (groups, families)
    logp = special.log_softmax(scaled_loglik, axis=1)
    group = np.stack([special.logsumexp(np.where(m[None, :], logp, -np.inf), axis=1) for m in member], axis=1)
    true_group = np.array([names.index(verdicts[t]) for t in truth])
    own = group[np.arange(truth.size), true_group]
    other = np.where(np.arange(len(names))[None, :] == true_group[:, None], -np.inf, group).max(axis=1)
    odds = np.clip(own - other, -np.log(99.0), np.log(99.0))
    spreads = [odds[cluster == c].std(ddof=1) for c in np.unique(cluster) if np.sum(cluster == c) > 1]
    return float(np.sqrt(np.mean(np.square(spreads)))) if spreads else 0.0
