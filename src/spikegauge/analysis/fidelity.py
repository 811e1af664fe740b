"""Statistical fidelity: has a setting changed the activity, not just the spikes?

Past the divergence time two runs of a chaotic network are different
realisations of the same activity, and spike-for-spike comparison no longer
says anything about the integration. What can still be asked is whether a
setting changed the *statistics* of the activity. The yardstick for "changed"
comes from the reference itself: the reference setting is run K times under
small perturbations of the same network (:func:`perturbed_network`), and the
spread of each statistic over those runs is what "the same activity" means
for this network (:class:`Yardstick`).

Two kinds of test, one family:

* scalar statistics (:func:`population_statistics`): the test run's value
  must lie within the t-distribution prediction interval of the K reference
  values, ``mean +- t_{1-a/2, K-1} s sqrt(1 + 1/K)`` (the interval that
  contains one new observation of a normal sample with probability 1 - a;
  ratio statistics on a log scale, :data:`LOG_SCALE`);
* ISI distributions, one per group: the two-sample Kolmogorov-Smirnov
  distance between the test's and the reference runs' inter-spike intervals,
  calibrated against the distances between reference runs (ISIs of one cell
  are not independent, so the textbook KS p-value does not apply).

Each test gives a p-value; Holm's step-down correction (Holm 1979, Scand J
Statist 6:65) keeps the chance that any statistic of a faithful setting fails
at most the family-wise level (default 5 %), whatever the dependence between
the statistics.
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats

from .population import (fano_factor, golomb_chi, isi_cv, ks_distance, mean_pair_correlation,
                         population_counts, rates_hz, spectral_peak)
from .rasters import as_raster

FAMILY_ALPHA = 0.05
"""Default family-wise level: the chance that a faithful setting fails any statistic."""

VOLTAGE_PERTURBATION_MV = 1.0
"""Largest move of an initial voltage in a yardstick run (mV); :meth:`Yardstick.from_runs` says why."""

MAX_INTERVAL_INFLATION = 1.2
"""The t prediction interval of the default K is at most this many times wider than with a known spread."""

STATISTICS = {
    "rate_{group}_hz": "mean firing rate of the group's cells (Hz), silent cells included",
    "cv_{group}": "mean coefficient of variation of the ISIs over the group's cells with at least "
                  "three spikes (1 for Poisson trains, 0 for clocks)",
    "fano": "Fano factor of the whole population's spike count in bins of count_bin_ms "
            "(about 1 for independent Poisson cells, larger when cells fire together)",
    "pair_correlation": "mean Pearson correlation of spike counts in bins of count_bin_ms over all "
                        "pairs of up to n_sample_cells cells (seeded draw)",
    "chi": "Golomb's synchrony measure chi on counts in bins of sync_bin_ms "
           "(about 1/sqrt(N) asynchronous, 1 fully synchronous)",
    "peak_freq_hz": "frequency (Hz) of the largest peak of the population rate's power spectrum "
                    "(Welch, bins of bin_ms), above 0 Hz",
    "peak_ratio": "power of that peak over the median power above 0 Hz (about 1 for a flat "
                  "spectrum, large for an oscillation)",
}
"""The scalar statistics of :func:`population_statistics`, each with what it means."""

LOG_SCALE = ("fano", "peak_ratio")
"""Statistics judged on a log scale: ratios of a variance or a power to a mean or a median,
right-skewed like the F and chi-square distributions, whose logarithms are much closer to normal.
On the demo-balanced network, judged on a linear scale, ``peak_ratio`` alone fell outside its
99 % prediction interval in 5 of 100 faithful runs."""


def _groups(raster):
    """(name, first cell, end cell) of each group of a raster."""
    first = list(raster.group_first) + [raster.n_cells]
    return [(str(name), int(first[g]), int(first[g + 1])) for g, name in enumerate(raster.group_names)]


def statistic_names(group_names) -> list[str]:
    """Names of the scalar statistics for groups ``group_names``, in table order."""
    names = [f"rate_{g}_hz" for g in group_names] + [f"cv_{g}" for g in group_names]
    return names + ["fano", "pair_correlation", "chi", "peak_freq_hz", "peak_ratio"]


def population_statistics(raster, *, bin_ms: float = 1.0, count_bin_ms: float = 50.0,
                          sync_bin_ms: float = 5.0, n_sample_cells: int = 100, seed: int = 0) -> dict:
    """Scalar statistics of one raster (see :data:`STATISTICS` for each one's meaning).

    Built from :mod:`spikegauge.analysis.population`, with the same bins as
    :func:`spikegauge.analysis.compare` uses by default.

    Parameters
    ----------
    raster : Raster, Run or anything :func:`~spikegauge.analysis.as_raster` reads
    bin_ms : float
        Bin of the population rate for its spectrum (ms).
    count_bin_ms : float
        Bin for the Fano factor and the pairwise count correlation (ms).
    sync_bin_ms : float
        Bin for Golomb's chi (ms).
    n_sample_cells : int
        Cells drawn (without replacement) for the pairwise correlation.
    seed : int
        Seed of that draw; the same seed draws the same cells in every run.

    Returns
    -------
    dict
        ``{name: float}`` in the order of :func:`statistic_names`; NaN where a
        statistic is undefined (e.g. the CV of a group with no cell firing
        three spikes).
    """
    r = as_raster(raster)
    rates, cv = rates_hz(r), isi_cv(r)
    out = {}
    for name, lo, hi in _groups(r):
        out[f"rate_{name}_hz"] = float(rates[lo:hi].mean()) if hi > lo else math.nan
    for name, lo, hi in _groups(r):
        c = cv[lo:hi][np.isfinite(cv[lo:hi])]
        out[f"cv_{name}"] = float(c.mean()) if c.size else math.nan
    out["fano"] = fano_factor(population_counts(r, count_bin_ms))
    cells = np.sort(np.random.default_rng(seed).choice(
        r.n_cells, size=min(n_sample_cells, r.n_cells), replace=False))
    out["pair_correlation"] = mean_pair_correlation(r, cells, count_bin_ms)
    out["chi"] = golomb_chi(r, sync_bin_ms)
    out["peak_freq_hz"], out["peak_ratio"] = spectral_peak(population_counts(r, bin_ms), bin_ms)
    return out


def group_isis(raster) -> dict:
    """Inter-spike intervals (ms) of each group, pooled over its cells: ``{name: ndarray}``."""
    r = as_raster(raster)
    same = np.diff(r.cell) == 0
    isi = np.diff(r.time_ms)[same]
    owner = r.cell[1:][same]
    return {name: isi[(owner >= lo) & (owner < hi)] for name, lo, hi in _groups(r)}


def perturbed_network(network, index: int, *, size_mv: float = VOLTAGE_PERTURBATION_MV, seed: int = 0):
    """The network with every initial voltage moved by a small seeded amount.

    Run ``index`` moves the initial voltage (state 0) of every cell by an
    independent amount drawn uniformly from ``[-size_mv, size_mv]``, from a
    stream keyed by ``(seed, index)``; ``index = 0`` returns the network
    unchanged (the reference itself is one realisation). Connectivity,
    parameters and drive stay the same.

    Parameters
    ----------
    network : Network
    index : int
        Which perturbation (0 for none).
    size_mv : float
        Largest move (mV).
    seed : int
        Seed of the perturbation streams (not the scenario's seed).

    Returns
    -------
    Network
        A new network; ``network`` is untouched.
    """
    if index == 0:
        return network
    y0 = np.array(network.y0, dtype=np.float64, copy=True)
    rng = np.random.default_rng([int(seed), int(index)])
    y0[:, 0] += rng.uniform(-size_mv, size_mv, size=y0.shape[0])
    return dataclasses.replace(network, y0=y0)


def default_runs(n_tests: int, family_alpha: float = FAMILY_ALPHA,
                 max_inflation: float = MAX_INTERVAL_INFLATION) -> int:
    """The smallest number K of reference runs for which the family-wise level means something.

    Two conditions, for ``M = n_tests`` tests under Holm's correction, whose
    strictest step tests one statistic at ``family_alpha / M``:

    * the KS part's p-value is empirical, at best ``1 / (K (K - 1) / 2 + 1)``
      with ``K (K - 1) / 2`` reference pairs; below ``family_alpha / M`` it
      must go, or an ISI distribution could never fail on its own;
    * the t prediction interval at that level, ``t_{1 - a/2, K-1} sqrt(1 + 1/K)``
      spreads wide, must be at most ``max_inflation`` times the normal
      quantile ``z_{1 - a/2}`` it tends to as K grows (so K buys little more
      power beyond it; a design choice, not a published rule). K >= 3
      always: two runs give one degree of freedom and, at 0.5 %, an interval
      56 times wider than the normal one (three runs: 5.8 times).

    For two groups (11 tests) at 5 %: the pairs need K = 22 (231 pairs; 21
    runs give 210 < 219), the interval K = 17 (1.196 times the normal width).

    Parameters
    ----------
    n_tests : int
        Number of tests in the family (scalar statistics plus ISI distributions).
    family_alpha : float
        Family-wise level.
    max_inflation : float
        Largest allowed ratio of the t interval to the normal one.

    Returns
    -------
    int
    """
    if not (0 < family_alpha < 1 and n_tests >= 1 and max_inflation > 1):
        raise ValueError("need 0 < family_alpha < 1, n_tests >= 1 and max_inflation > 1")
    level = family_alpha / n_tests
    z = stats.norm.ppf(1 - level / 2)
    k = 3
    while (k * (k - 1) / 2 + 1) * level < 1 or \
            stats.t.ppf(1 - level / 2, k - 1) * math.sqrt(1 + 1 / k) > max_inflation * z:
        k += 1
    return k


def holm_adjust(p_values) -> np.ndarray:
    """Holm's step-down adjusted p-values (Holm 1979).

    Sorted ascending, the i-th smallest of M p-values (i from 1) is adjusted
    to ``max_{j <= i} min(1, (M - j + 1) p_(j))``; a hypothesis is rejected at
    family-wise level a when its adjusted p-value is at most a. NaN p-values
    are not allowed.

    Parameters
    ----------
    p_values : array_like, shape (M,)

    Returns
    -------
    ndarray, shape (M,)
        Adjusted p-values in the input order.
    """
    p = np.asarray(p_values, dtype=np.float64)
    if np.isnan(p).any():
        raise ValueError("holm_adjust: NaN p-value")
    m = p.size
    order = np.argsort(p, kind="stable")
    scaled = np.minimum(1.0, (m - np.arange(m)) * p[order])
    out = np.empty(m)
    out[order] = np.maximum.accumulate(scaled)
    return out


def prediction_p_value(values, test: float) -> float:
    """Two-sided p-value of one new observation against a normal sample ``values``.

    ``T = (test - mean) / (s sqrt(1 + 1/K))`` follows Student's t with K - 1
    degrees of freedom when ``test`` and the K ``values`` are independent
    draws of one normal distribution, so ``p = 2 P(t_{K-1} > |T|)``, and
    ``test`` lies within the prediction interval
    ``mean +- t_{1-a/2, K-1} s sqrt(1 + 1/K)`` exactly when ``p > a``.
    A sample without spread (all K values equal) gives 1 if ``test`` equals
    them and 0 otherwise; a non-finite ``test`` gives 0.

    Parameters
    ----------
    values : array_like, shape (K,), K >= 3
    test : float

    Returns
    -------
    float
    """
    x = np.asarray(values, dtype=np.float64)
    if x.size < 3:
        raise ValueError(f"a prediction interval needs at least 3 reference values, got {x.size}")
    if not math.isfinite(test):
        return 0.0
    mean, s = x.mean(), x.std(ddof=1)
    if not s > 0:
        return 1.0 if test == mean else 0.0
    t_stat = (test - mean) / (s * math.sqrt(1 + 1 / x.size))
    return float(2 * stats.t.sf(abs(t_stat), x.size - 1))


def _pair_distances(samples) -> np.ndarray:
    """KS distance of every pair (i < j) of samples, shape (K (K - 1) / 2,)."""
    return np.array([ks_distance(samples[i], samples[j])
                     for i in range(len(samples)) for j in range(i + 1, len(samples))])


@dataclass(frozen=True, eq=False)
class Yardstick:
    """What "the same activity" means for one network: statistics of K reference runs.

    Build it with :meth:`from_runs`; judge a setting's run with :meth:`judge`.

    Attributes
    ----------
    names : tuple of str
        Scalar statistics (:func:`statistic_names`) that are finite in every
        reference run; the others are listed in ``left_out``.
    values : ndarray, shape (K, len(names))
        Their values in each reference run.
    groups : tuple of str
        Groups whose ISI distributions are judged (those with at least two
        ISIs in every reference run).
    isis : tuple of dict
        Per reference run, ``{group: ISIs (ms)}``.
    null_distances : dict
        Per group, the KS distances of every pair of reference runs, shape
        (K (K - 1) / 2,).
    left_out : dict
        ``{statistic: reason}`` for statistics that cannot be judged.
    options : dict
        Bins and sampling of :func:`population_statistics`, used again for the test run.
    n_distinct : int
        Number of reference rasters that differ from each other (fewer than
        K when a perturbation changed no spike time).
    shape : tuple
        ``(n_cells, t_start_ms, t_stop_ms, group_names)`` of the reference
        runs; a test run must match it.
    """

    names: tuple
    values: np.ndarray
    groups: tuple
    isis: tuple
    null_distances: dict
    left_out: dict = field(default_factory=dict)
    options: dict = field(default_factory=dict)
    n_distinct: int = 0
    shape: tuple = ()

    @property
    def k(self) -> int:
        """Number of reference runs."""
        return int(self.values.shape[0])

    @property
    def n_tests(self) -> int:
        """Tests in the family: scalar statistics plus ISI distributions."""
        return len(self.names) + len(self.groups)

    @classmethod
    def from_runs(cls, reference_runs, **options) -> "Yardstick":
        """The yardstick from K runs of the reference setting under small perturbations.

        Perturbation: every initial voltage moved by up to 1 mV
        (:func:`perturbed_network`); connectivity, parameters and drive stay.
        Not a new drive seed: a setting is judged on the same network *and
        the same drive* as the reference, so the yardstick must vary only
        what a setting can vary, the trajectory; a new drive realisation
        would add input variability no setting sees and widen the yardstick.
        Not a tiny move (1e-6 mV, as the sensitivity probes use) either: such
        runs follow the reference spike for spike up to the divergence time
        and share that stretch of activity with it and with each other, so
        their spread is too small and centred on the reference's own
        realisation, while a setting with a visible error leaves the
        reference much earlier. On the bundled demo-balanced (divergence
        after 350-950 ms) such a yardstick failed euler at 0.025 ms on the
        pairwise correlation (0.098 against 0.051 +- 0.010), and a
        false-alarm check cannot see that, because its held-out runs share
        the same stretch. A 1 mV move (small next to the 10-15 mV between
        reset and threshold of the usual models) loses agreement within the
        first spikes of a chaotic network (within the first 50 ms window on
        demo-balanced), so the K runs are different realisations over the
        whole run, as a faithful setting's run is after its own divergence;
        for a setting that follows the reference longer the test is
        conservative. A network
        that is not chaotic forgets the moves and gives nearly identical
        statistics, so any setting's error fails; judge it spike by spike.

        Parameters
        ----------
        reference_runs : sequence of Run, Raster or anything ``as_raster`` reads
            K >= 3 runs of the reference setting on the same cells and
            interval (the unperturbed reference may be one of them). See
            :func:`default_runs` for how many.
        **options
            ``bin_ms``, ``count_bin_ms``, ``sync_bin_ms``, ``n_sample_cells``,
            ``seed`` of :func:`population_statistics`.

        Returns
        -------
        Yardstick
        """
        rasters = [as_raster(r) for r in reference_runs]
        if len(rasters) < 3:
            raise ValueError(f"a yardstick needs at least 3 reference runs, got {len(rasters)}")
        r0 = rasters[0]
        for r in rasters[1:]:
            if (r.n_cells, r.t_start_ms, r.t_stop_ms, r.group_names) != \
                    (r0.n_cells, r0.t_start_ms, r0.t_stop_ms, r0.group_names):
                raise ValueError("reference runs must have the same cells, groups and interval")
        table = [population_statistics(r, **options) for r in rasters]
        all_names = statistic_names(r0.group_names)
        values = np.array([[t[n] for n in all_names] for t in table])
        finite = np.isfinite(values).all(axis=0)
        left_out = {n: "undefined in some reference runs" for n, ok in zip(all_names, finite) if not ok}
        for j, n in enumerate(all_names):
            if n in LOG_SCALE and finite[j] and not values[:, j].min() > 0:
                finite[j] = False
                left_out[n] = "not positive in some reference runs (judged on a log scale)"
        isis = tuple(group_isis(r) for r in rasters)
        groups = []
        for g in r0.group_names:
            if all(s[g].size >= 2 for s in isis):
                groups.append(g)
            else:
                left_out[f"isi_{g}"] = "fewer than two ISIs in some reference runs"
        null = {g: _pair_distances([s[g] for s in isis]) for g in groups}
        distinct = {(r.cell.tobytes(), r.time_ms.tobytes()) for r in rasters}
        return cls(names=tuple(n for n, ok in zip(all_names, finite) if ok), values=values[:, finite],
                   groups=tuple(groups), isis=isis, null_distances=null, left_out=left_out,
                   options=dict(options), n_distinct=len(distinct),
                   shape=(r0.n_cells, r0.t_start_ms, r0.t_stop_ms, tuple(r0.group_names)))

    def judge(self, test_run, family_alpha: float = FAMILY_ALPHA):
        """Whether a run's statistics are indistinguishable from the reference's.

        Scalar statistics: :func:`prediction_p_value` against the K reference
        values (of their logarithms for the statistics in :data:`LOG_SCALE`;
        a non-positive value there fails). ISI distributions: the test's distance is the mean KS distance
        of its ISIs to those of each reference run; its empirical p-value is
        ``(1 + #{reference pairs at least as far apart}) / (K (K - 1) / 2 + 1)``
        over the ``K (K - 1) / 2`` pairs of reference runs. Under the null the
        test run is one more realisation, and each of its K distances is
        distributed as a pair distance; their mean spreads less than one
        distance, so it rarely lands in the upper tail and the p-value errs on
        the safe side. (A rank test exact under exchangeability, e.g. the test
        against the K - 1 distances of one reference run to the others, could
        not go below 1/K and would need hundreds of runs to act under Holm's
        correction.) All p-values are then Holm-adjusted together.

        Parameters
        ----------
        test_run : Run, Raster or anything ``as_raster`` reads
            Same cells and interval as the reference runs.
        family_alpha : float
            Family-wise level.

        Returns
        -------
        passed : bool
            Every statistic passes (Holm-adjusted p-value above ``family_alpha``).
        table : DataFrame
            One row per test: ``statistic``, ``kind`` ("t" or "ks"), ``scale``
            ("log" or "linear": where the t interval is taken),
            ``reference_mean`` (for "ks": the mean distance between reference
            runs), ``spread`` (sample standard deviation over the K runs; for
            "ks", of the pair distances), ``test_value`` (for "ks": the test's
            mean distance), ``p_value``, ``holm_p``, ``passed``. Means and
            spreads are in the statistic's own units, also on a log scale.
        """
        if not 0 < family_alpha < 1:
            raise ValueError(f"family_alpha must be between 0 and 1, got {family_alpha}")
        r = as_raster(test_run)
        if (r.n_cells, r.t_start_ms, r.t_stop_ms, tuple(r.group_names)) != self.shape:
            raise ValueError(f"the test run ({r.n_cells} cells, groups {list(r.group_names)}, "
                             f"{r.t_start_ms:g}-{r.t_stop_ms:g} ms) does not match the reference runs "
                             f"({self.shape[0]} cells, groups {list(self.shape[3])}, "
                             f"{self.shape[1]:g}-{self.shape[2]:g} ms)")
        stats_test = population_statistics(r, **self.options)
        rows = []
        for j, name in enumerate(self.names):
            x, y = self.values[:, j], float(stats_test[name])
            if name in LOG_SCALE:  # reference values are positive (from_runs); a test value <= 0 fails
                p = prediction_p_value(np.log(x), math.log(y)) if y > 0 else 0.0
            else:
                p = prediction_p_value(x, y)
            rows.append(dict(statistic=name, kind="t", scale="log" if name in LOG_SCALE else "linear",
                             reference_mean=float(x.mean()), spread=float(x.std(ddof=1)),
                             test_value=y, p_value=p))
        isis = group_isis(r)
        for g in self.groups:
            null = self.null_distances[g]
            d = np.array([ks_distance(isis[g], s[g]) for s in self.isis]) if isis[g].size else \
                np.ones(self.k)
            dist = float(d.mean())
            p = (1 + np.count_nonzero(null >= dist)) / (null.size + 1)
            rows.append(dict(statistic=f"isi_{g}", kind="ks", scale="linear",
                             reference_mean=float(null.mean()),
                             spread=float(null.std(ddof=1)) if null.size > 1 else math.nan,
                             test_value=dist, p_value=float(p)))
        table = pd.DataFrame(rows, columns=["statistic", "kind", "scale", "reference_mean", "spread",
                                            "test_value", "p_value"])
        table["holm_p"] = holm_adjust(table["p_value"].to_numpy()) if len(table) else []
        table["passed"] = table["holm_p"] > family_alpha
        return bool(table["passed"].all()), table
