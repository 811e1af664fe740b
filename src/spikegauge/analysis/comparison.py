"""Compare a test raster with a reference raster, or several tests with one reference."""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
import pandas as pd

from ..errors import InputError
from .distances import (coincidence_factor_per_cell, gamma_from_counts, van_rossum_per_cell,
                        victor_purpura_per_cell)
from .horizon import agreement_over_time, divergence_horizon
from .matching import Matching, match_rasters
from .population import isi_cv, population_statistics, rates_hz
from .rasters import Raster, load_rasters

_PERCENTILES = (50.0, 95.0, 99.0)


@dataclass(frozen=True, eq=False)
class Comparison:
    """What separates a test raster from a reference raster.

    Attributes
    ----------
    summary : dict
        Headline figures, JSON-ready (see :func:`compare` for the keys).
    pairs : DataFrame
        One row per matched pair: ``cell``, ``ref_time_ms``, ``test_time_ms``,
        ``shift_ms`` (test - reference).
    per_cell : DataFrame
        One row per cell: ``cell``, ``group``, ``n_ref``, ``n_test``,
        ``matched``, ``missed``, ``extra``, ``rate_ref_hz``, ``rate_test_hz``,
        ``rate_error_hz``, ``shift_mean_ms``, ``shift_rms_ms``, ``van_rossum``,
        ``victor_purpura``, ``coincidence_factor``, ``cv_ref``, ``cv_test``.
    per_group : DataFrame
        The spike-matching summary per group, indexed by group name.
    over_time : DataFrame
        Agreement in sliding windows (see
        :func:`spikegauge.analysis.horizon.agreement_over_time`).
    reference, test : Raster
        The rasters compared, on their common cells and interval.
    matching : Matching
        Partner index of every spike (-1: missed / extra).
    settings : dict
        The options used.
    """

    summary: dict
    pairs: pd.DataFrame
    per_cell: pd.DataFrame
    per_group: pd.DataFrame
    over_time: pd.DataFrame
    reference: Raster = field(repr=False)
    test: Raster = field(repr=False)
    matching: Matching = field(repr=False)
    settings: dict = field(default_factory=dict)

    @property
    def missed(self) -> pd.DataFrame:
        """Reference spikes without a test partner: ``cell``, ``time_ms``."""
        keep = self.matching.ref_partner < 0
        return pd.DataFrame({"cell": self.reference.cell[keep], "time_ms": self.reference.time_ms[keep]})

    @property
    def extra(self) -> pd.DataFrame:
        """Test spikes without a reference partner: ``cell``, ``time_ms``."""
        keep = self.matching.test_partner < 0
        return pd.DataFrame({"cell": self.test.cell[keep], "time_ms": self.test.time_ms[keep]})

    def to_frame(self) -> pd.DataFrame:
        """The per-cell figures as a tidy table: one row per cell, one column per figure.

        Returns
        -------
        DataFrame, shape (n_cells, 17)
            The columns of :attr:`per_cell`: ``cell`` (int64), ``group``
            (categorical, in the rasters' group order), the spike counts
            ``n_ref``, ``n_test``, ``matched``, ``missed``, ``extra`` (int64),
            and float64 figures (NaN where undefined): ``rate_ref_hz``,
            ``rate_test_hz``, ``rate_error_hz``, ``shift_mean_ms``,
            ``shift_rms_ms``, ``van_rossum``, ``victor_purpura``,
            ``coincidence_factor``, ``cv_ref``, ``cv_test``.
        """
        out = self.per_cell.copy()
        out["group"] = pd.Categorical(out["group"], categories=list(self.reference.group_names))
        return _typed(out, ints=("cell", "n_ref", "n_test", "matched", "missed", "extra"),
                      keep=("group",))

    def to_dict(self) -> dict:
        """Summary, settings, per-group summary and windows as plain JSON-ready values."""
        return jsonable({"summary": self.summary, "settings": self.settings,
                       "per_group": self.per_group.reset_index().to_dict(orient="records"),
                       "over_time": self.over_time.to_dict(orient="list")})

    def to_json(self, path=None, indent: int = 1) -> str:
        """JSON text of :meth:`to_dict` (NaN written as null); also written to ``path`` if given."""
        return _json_text(self.to_dict(), path, indent)


_INT_FIGURES = ("n_cells", "n_ref", "n_test", "matched", "missed", "extra", "coincidence_factor_undefined",
                "duplicates_ref", "duplicates_test")
"""Summary figures that are counts (int64 in tables); ``diverged`` is bool, the rest float64."""


def _typed(frame: pd.DataFrame, ints=(), bools=(), strings=(), keep=()) -> pd.DataFrame:
    """``frame`` with fixed dtypes: int64, bool and string where named, float64 elsewhere (None -> NaN)."""
    out = {}
    for col in frame.columns:
        if col in keep:
            out[col] = frame[col]
        elif col in ints:
            out[col] = frame[col].astype(np.int64)
        elif col in bools:
            out[col] = frame[col].astype(bool)
        elif col in strings:
            out[col] = frame[col].astype("string")
        else:
            out[col] = pd.to_numeric(frame[col], errors="coerce").astype(np.float64)
    return pd.DataFrame(out, index=frame.index)


def _json_text(data, path, indent: int) -> str:
    """JSON text of JSON-ready ``data``; also written to ``path`` if given."""
    text = json.dumps(data, indent=indent, allow_nan=False)
    if path is not None:
        with open(path, "w", encoding="utf-8") as fh:
            fh.write(text + "\n")
    return text


def jsonable(value):
    """Numpy scalars and arrays to Python, NaN and inf to None, recursively (for JSON)."""
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [jsonable(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _spike_summary(shift: np.ndarray, n_ref: int, n_test: int, first_error_ms: float) -> dict:
    """Counts, fractions and jitter statistics of one set of pairs."""
    matched = int(shift.size)
    nan = float("nan")
    out = {"n_ref": int(n_ref), "n_test": int(n_test), "matched": matched,
           "missed": int(n_ref - matched), "extra": int(n_test - matched)}
    # Fractions of reference spikes; without reference spikes an extra one has no fraction.
    out["missed_fraction"] = (n_ref - matched) / n_ref if n_ref else 0.0
    out["extra_fraction"] = (n_test - matched) / n_ref if n_ref else (0.0 if not n_test else nan)
    out["mismatch_fraction"] = out["missed_fraction"] + out["extra_fraction"]
    if matched:
        a = np.abs(shift)
        p50, p95, p99 = np.percentile(a, _PERCENTILES)
        out.update(shift_mean_ms=float(shift.mean()), shift_rms_ms=float(np.sqrt(np.mean(shift * shift))),
                   shift_median_abs_ms=float(p50), shift_p95_abs_ms=float(p95),
                   shift_p99_abs_ms=float(p99), shift_max_abs_ms=float(a.max()))
    else:
        out.update(shift_mean_ms=nan, shift_rms_ms=nan, shift_median_abs_ms=nan,
                   shift_p95_abs_ms=nan, shift_p99_abs_ms=nan, shift_max_abs_ms=nan)
    out["first_error_ms"] = float(first_error_ms)
    return out


def _distribution(name: str, values: np.ndarray) -> dict:
    """Mean, median and 95th percentile over the cells where ``values`` is defined."""
    v = values[np.isfinite(values)]
    if not v.size:
        return {f"{name}_mean": float("nan"), f"{name}_median": float("nan"), f"{name}_p95": float("nan")}
    p50, p95 = np.percentile(v, (50.0, 95.0))
    return {f"{name}_mean": float(v.mean()), f"{name}_median": float(p50), f"{name}_p95": float(p95)}


def compare(reference, test, *, match_window_ms: float = 2.0, tau_ms: float = 5.0,
            cost_per_ms: float | None = None, coincidence_window_ms: float = 2.0,
            horizon_window_ms: float = 50.0, min_agreement: float = 0.5,
            jitter_limit_ms: float | None = None, bin_ms: float = 1.0, count_bin_ms: float = 50.0,
            sync_bin_ms: float = 5.0, n_sample_cells: int = 100, seed: int = 0,
            n_cells: int | None = None, t_start_ms: float | None = None,
            t_stop_ms: float | None = None, time_unit: str = "ms", population=None,
            unit_id_column: str | None = None) -> Comparison:
    """Compare a test raster with a reference raster.

    Parameters
    ----------
    reference, test
        Anything :func:`spikegauge.analysis.rasters.load_rasters` reads: a
        Raster, run folder, run object, DataFrame, NPZ or text file, SONATA
        spike file, NWB file, or list of ``neo.SpikeTrain``.
    match_window_ms : float
        Largest |shift| of a matched pair (ms). Matching is optimal per cell:
        most pairs, then least summed |shift| (:mod:`.matching`).
    tau_ms : float
        van Rossum time constant (ms).
    cost_per_ms : float, optional
        Victor–Purpura cost of moving a spike 1 ms (1/ms). Default
        ``2 / match_window_ms``: a shift beyond the match window costs more
        than a deletion and an insertion, as for matching.
    coincidence_window_ms : float
        Coincidence window of the coincidence factor (ms).
    horizon_window_ms : float
        Sliding-window length (ms) for agreement over time (stride half of it).
    min_agreement : float
        Chance-corrected agreement below which a window counts as diverged.
    jitter_limit_ms : float, optional
        RMS jitter above which a window counts as diverged.
    bin_ms, count_bin_ms, sync_bin_ms, n_sample_cells, seed
        Population statistics (:func:`.population.population_statistics`).
    n_cells, t_start_ms, t_stop_ms, time_unit, population, unit_id_column
        For sources that do not carry them, and the SONATA population and NWB
        id column (:func:`.rasters.load_rasters`).
        ``t_start_ms`` also skips an initial transient.

    Returns
    -------
    Comparison
        ``summary`` holds: ``n_cells``, ``t_start_ms``, ``t_stop_ms``,
        ``n_ref``, ``n_test``, ``matched``, ``missed``, ``extra``,
        ``missed_fraction``, ``extra_fraction`` (of reference spikes),
        ``mismatch_fraction`` (their sum), ``shift_mean_ms`` (bias),
        ``shift_rms_ms``, ``shift_median_abs_ms``, ``shift_p95_abs_ms``,
        ``shift_p99_abs_ms``, ``shift_max_abs_ms``, ``first_error_ms`` (time
        from the start to the first missed or extra spike; the whole interval
        if none), ``horizon_ms``, ``diverged``, ``rate_error_mean_hz``,
        ``rate_error_rms_hz`` (over cells), ``van_rossum_{mean,median,p95}``,
        ``victor_purpura_{mean,median,p95}``,
        ``coincidence_factor_{mean,median,p95}``,
        ``coincidence_factor_undefined`` (cells where 2νΔ >= 1),
        ``duplicates_ref``, ``duplicates_test`` and the population statistics
        of :func:`.population.population_statistics`.
    """
    ref, tst = load_rasters([reference, test], n_cells=n_cells, t_start_ms=t_start_ms,
                            t_stop_ms=t_stop_ms, time_unit=time_unit, population=population,
                            unit_id_column=unit_id_column)
    if cost_per_ms is None:
        cost_per_ms = 2.0 / match_window_ms if match_window_ms > 0 else float("inf")
    settings = dict(match_window_ms=float(match_window_ms), tau_ms=float(tau_ms),
                    cost_per_ms=float(cost_per_ms),
                    coincidence_window_ms=float(coincidence_window_ms),
                    horizon_window_ms=float(horizon_window_ms), min_agreement=float(min_agreement),
                    jitter_limit_ms=jitter_limit_ms, bin_ms=float(bin_ms),
                    count_bin_ms=float(count_bin_ms), sync_bin_ms=float(sync_bin_ms),
                    n_sample_cells=int(n_sample_cells), seed=int(seed),
                    reference=ref.source, test=tst.source)
    for key in ("horizon_window_ms", "bin_ms", "count_bin_ms", "sync_bin_ms"):
        if not settings[key] > 0:
            raise InputError(f"{key} must be > 0, got {settings[key]}")
    span = ref.t_stop_ms - ref.t_start_ms
    n_bins = span / min(settings["bin_ms"], 0.5 * settings["horizon_window_ms"])
    if not n_bins <= MAX_TIME_BINS:
        raise InputError(f"{tst.source}: the interval {ref.t_start_ms:g}-{ref.t_stop_ms:g} ms holds "
                         f"{n_bins:.3g} time bins of the population statistics; give --t-stop-ms "
                         "(or larger bins)")
    m = match_rasters(ref, tst, match_window_ms)
    return _assemble(ref, tst, m, settings)


MAX_TIME_BINS = 5e7
"""More time bins than this (over 13 hours in 1 ms bins) is refused, not attempted."""


def _assemble(ref: Raster, tst: Raster, m: Matching, settings: dict) -> Comparison:
    n = ref.n_cells
    ok = m.ref_partner >= 0
    partner = m.ref_partner[ok]
    pair_cell = ref.cell[ok]
    shift = tst.time_ms[partner] - ref.time_ms[ok]
    pairs = pd.DataFrame({"cell": pair_cell, "ref_time_ms": ref.time_ms[ok],
                          "test_time_ms": tst.time_ms[partner], "shift_ms": shift})
    n_ref, n_test = ref.counts(), tst.counts()
    matched = np.bincount(pair_cell, minlength=n)
    with np.errstate(divide="ignore", invalid="ignore"):
        shift_mean = np.bincount(pair_cell, shift, minlength=n) / matched
        shift_rms = np.sqrt(np.bincount(pair_cell, shift * shift, minlength=n) / matched)
    rate_ref, rate_test = rates_hz(ref), rates_hz(tst)
    if settings["coincidence_window_ms"] == m.window_ms:
        # Same window: the coincidences are the pairs already matched.
        gamma = gamma_from_counts(matched, n_ref, n_test, ref.duration_ms, m.window_ms)
    else:
        gamma, _ = coincidence_factor_per_cell(ref, tst, settings["coincidence_window_ms"])
    cv_ref, cv_test = isi_cv(ref), isi_cv(tst)
    group = ref.group_of(np.arange(n))
    per_cell = pd.DataFrame({
        "cell": np.arange(n), "group": np.asarray(ref.group_names, dtype=object)[group] if n else [],
        "n_ref": n_ref, "n_test": n_test, "matched": matched, "missed": n_ref - matched,
        "extra": n_test - matched, "rate_ref_hz": rate_ref, "rate_test_hz": rate_test,
        "rate_error_hz": rate_test - rate_ref, "shift_mean_ms": shift_mean, "shift_rms_ms": shift_rms,
        "van_rossum": van_rossum_per_cell(ref, tst, settings["tau_ms"]),
        "victor_purpura": victor_purpura_per_cell(ref, tst, settings["cost_per_ms"]),
        "coincidence_factor": gamma, "cv_ref": cv_ref, "cv_test": cv_test})

    # Time of the first missed or extra spike, overall and per group.
    err_cell = np.concatenate([ref.cell[~ok], tst.cell[m.test_partner < 0]])
    err_time = np.concatenate([ref.time_ms[~ok], tst.time_ms[m.test_partner < 0]])
    span = ref.duration_ms

    def first_error(mask=None):
        t = err_time if mask is None else err_time[mask]
        return float(t.min() - ref.t_start_ms) if t.size else span

    summary = {"n_cells": int(n), "t_start_ms": ref.t_start_ms, "t_stop_ms": ref.t_stop_ms}
    summary.update(_spike_summary(shift, ref.n_spikes, tst.n_spikes, first_error()))
    over_time = agreement_over_time(ref, tst, m, window_ms=settings["horizon_window_ms"])
    summary["horizon_ms"], summary["diverged"] = divergence_horizon(
        over_time, ref.t_start_ms, ref.t_stop_ms, min_agreement=settings["min_agreement"],
        jitter_limit_ms=settings["jitter_limit_ms"])
    rate_err = rate_test - rate_ref
    summary["rate_error_mean_hz"] = float(rate_err.mean()) if n else float("nan")
    summary["rate_error_rms_hz"] = float(np.sqrt(np.mean(rate_err ** 2))) if n else float("nan")
    for name in ("van_rossum", "victor_purpura", "coincidence_factor"):
        summary.update(_distribution(name, per_cell[name].to_numpy()))
    summary["coincidence_factor_undefined"] = int(np.isnan(gamma).sum())
    summary["duplicates_ref"] = ref.n_duplicates
    summary["duplicates_test"] = tst.n_duplicates
    summary.update(population_statistics(
        ref, tst, bin_ms=settings["bin_ms"], count_bin_ms=settings["count_bin_ms"],
        sync_bin_ms=settings["sync_bin_ms"], n_sample_cells=settings["n_sample_cells"],
        seed=settings["seed"], cv=(cv_ref, cv_test)))

    rows = {}
    err_group = ref.group_of(err_cell)
    pair_group = group[pair_cell]
    for g, name in enumerate(ref.group_names):
        cells = group == g
        row = _spike_summary(shift[pair_group == g], int(n_ref[cells].sum()), int(n_test[cells].sum()),
                             first_error(err_group == g))
        row.update(_distribution("van_rossum", per_cell["van_rossum"].to_numpy()[cells]))
        row.update(_distribution("coincidence_factor", gamma[cells]))
        rows[name] = row
    per_group = pd.DataFrame.from_dict(rows, orient="index")
    per_group.index.name = "group"
    return Comparison(summary=summary, pairs=pairs, per_cell=per_cell, per_group=per_group,
                      over_time=over_time, reference=ref, test=tst, matching=m, settings=settings)


@dataclass(frozen=True, eq=False)
class ComparisonSet:
    """Several tests compared with one reference.

    Attributes
    ----------
    comparisons : dict of str -> Comparison
        One per test, in the order given.
    table : DataFrame
        One row per test (index ``name``): every summary figure, and ``cost``
        and ``on_front`` when costs were given.
    front : DataFrame or None
        The cost-accuracy front: the rows of ``table`` that no other test
        beats in both ``cost`` and ``accuracy_key`` (lower is better for
        both), sorted by cost. None without costs.
    accuracy_key : str
        The summary figure used as the error on the front.
    """

    comparisons: dict
    table: pd.DataFrame
    front: pd.DataFrame | None
    accuracy_key: str

    def to_frame(self) -> pd.DataFrame:
        """One row per test raster, its summary figures as columns.

        Returns
        -------
        DataFrame, shape (n_tests, 1 + n_figures)
            ``test`` (string, the name given) and every summary figure of
            :func:`compare`: the counts (``n_cells``, ``n_ref``, ``n_test``,
            ``matched``, ``missed``, ``extra``, ``coincidence_factor_undefined``,
            ``duplicates_ref``, ``duplicates_test``) as int64, ``diverged`` as
            bool, every other figure as float64 (NaN where undefined); with
            costs also ``cost`` (float64) and ``on_front`` (bool). Rows in the
            order the tests were given.
        """
        return _typed(self.table.reset_index(names="test"), ints=_INT_FIGURES, bools=("diverged", "on_front"),
                      strings=("test",))

    def to_dict(self) -> dict:
        """Every comparison's :meth:`Comparison.to_dict` by name, plus costs and the front."""
        out = {"tests": {k: c.to_dict() for k, c in self.comparisons.items()},
               "accuracy_key": self.accuracy_key}
        if self.front is not None:
            out["costs"] = dict(zip(self.table.index, self.table["cost"]))
            out["front"] = list(self.front.index)
        return jsonable(out)

    def to_json(self, path=None, indent: int = 1) -> str:
        """JSON text of :meth:`to_dict` (NaN written as null); also written to ``path`` if given."""
        return _json_text(self.to_dict(), path, indent)


def pareto_front(cost: np.ndarray, error: np.ndarray) -> np.ndarray:
    """Mask of points no other point beats: cost and error both no larger, one smaller.

    NaN costs or errors are never on the front. O(n log n): sort by (cost,
    error) and keep each point whose error is below every cheaper point's.
    """
    cost = np.asarray(cost, dtype=np.float64)
    error = np.asarray(error, dtype=np.float64)
    on = np.zeros(cost.size, dtype=bool)
    valid = np.flatnonzero(np.isfinite(cost) & np.isfinite(error))
    best = np.inf
    for k in valid[np.lexsort((error[valid], cost[valid]))]:
        if error[k] < best:
            on[k] = True
            best = error[k]
    return on


def compare_many(reference, tests: Mapping, costs: Mapping | None = None, *,
                 accuracy_key: str = "mismatch_fraction", **options) -> ComparisonSet:
    """Compare several tests with one reference; with costs, rank them on a front.

    Parameters
    ----------
    reference
        The reference raster (any source :func:`compare` accepts).
    tests : mapping of str -> source
        Test rasters by name.
    costs : mapping of str -> float, optional
        Cost of each test in any unit the user chooses (for example wall
        seconds measured in another simulator). Tests without a cost get NaN
        and stay off the front.
    accuracy_key : str
        Summary figure treated as the error on the front (lower is better),
        e.g. ``mismatch_fraction``, ``shift_rms_ms``, ``van_rossum_mean``.
    **options
        Passed to :func:`compare`. Cell labels of text files are mapped by the
        sorted union over the reference and all tests.
    """
    if not tests:
        raise InputError("compare_many needs at least one test raster")
    names = [str(k) for k in tests]
    load_keys = ("n_cells", "t_start_ms", "t_stop_ms", "time_unit", "population", "unit_id_column")
    load = {k: options.pop(k) for k in load_keys if k in options}
    rasters = load_rasters([reference, *tests.values()], **load)
    comparisons = {name: compare(rasters[0], r, **options) for name, r in zip(names, rasters[1:])}
    table = pd.DataFrame.from_dict({k: c.summary for k, c in comparisons.items()}, orient="index")
    table.index.name = "name"
    if accuracy_key not in table.columns:
        raise InputError(f"unknown accuracy figure {accuracy_key!r}; choose one of the summary keys")
    front = None
    if costs is not None:
        unknown = set(map(str, costs)) - set(names)
        if unknown:
            raise InputError(f"costs given for unknown test(s): {', '.join(sorted(unknown))}")
        cost_of = {str(k): float(v) for k, v in costs.items()}
        table["cost"] = [cost_of.get(n, float("nan")) for n in names]
        table["on_front"] = pareto_front(table["cost"].to_numpy(), table[accuracy_key].to_numpy())
        front = table[table["on_front"]].sort_values("cost")
    return ComparisonSet(comparisons=comparisons, table=table, front=front, accuracy_key=accuracy_key)
