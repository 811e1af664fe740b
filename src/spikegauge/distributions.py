"""Value specifications: how a scenario gives one number per cell or per synapse.

A value in a scenario file is one of

* a plain number: every cell (synapse, event) gets it;
* ``{distribution = "uniform", low = a, high = b}``: uniform on [a, b);
* ``{distribution = "normal", mean = m, std = s}``, optionally with ``low`` and/or
  ``high``: normal, *truncated* to [low, high] when bounds are given (values outside
  are redrawn, so no probability mass piles up at a bound as clipping would do);
* ``{distribution = "lognormal", mean = m, std = s}``: lognormal whose *values*
  have mean m and standard deviation s (not the parameters of the logarithm);
* ``{file = "path"}``: one value per cell, read from ``.npy`` (1-D) or ``.csv`` /
  ``.txt`` (one column, optional header line, ``#`` comments), the path relative to
  the scenario file. The file is read and checked when the scenario is loaded.

:func:`parse_value_spec` turns the raw TOML value into one of the frozen classes
below and raises :class:`~spikegauge.errors.InputError` naming the key path;
every class has ``sample(rng, n)``, which draws ``n`` values (float64) from a
:class:`numpy.random.Generator`, and ``support()``, the smallest and largest
value it can produce (used to check signs and bounds before anything is drawn).
"""
from __future__ import annotations

import difflib
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

from .errors import InputError

DISTRIBUTIONS = ("uniform", "normal", "lognormal")


@dataclass(frozen=True)
class Constant:
    """The same value everywhere."""

    value: float

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """Return ``n`` copies of the value (draws nothing from ``rng``)."""
        return np.full(n, self.value, dtype=np.float64)

    def support(self) -> tuple[float, float]:
        """Smallest and largest value that can be drawn."""
        return self.value, self.value


@dataclass(frozen=True)
class Uniform:
    """Uniform on [low, high)."""

    low: float
    high: float

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        return rng.uniform(self.low, self.high, size=n)

    def support(self) -> tuple[float, float]:
        return self.low, self.high


@dataclass(frozen=True)
class Normal:
    """Normal with mean and standard deviation, truncated to [low, high] if given."""

    mean: float
    std: float
    low: float = -math.inf
    high: float = math.inf

    def _frozen(self):
        a = (self.low - self.mean) / self.std
        b = (self.high - self.mean) / self.std
        return stats.truncnorm(a, b, loc=self.mean, scale=self.std)

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        if self.std == 0.0:
            return np.full(n, self.mean, dtype=np.float64)
        if math.isinf(self.low) and math.isinf(self.high):
            return rng.normal(self.mean, self.std, size=n)
        # Inverse-CDF sampling (scipy) stays exact far in the tails, where
        # redrawing until inside the bounds could loop for a long time.
        return np.asarray(self._frozen().rvs(size=n, random_state=rng), dtype=np.float64)

    def support(self) -> tuple[float, float]:
        if self.std == 0.0:
            return self.mean, self.mean
        return self.low, self.high


@dataclass(frozen=True)
class LogNormal:
    """Lognormal whose values have the given mean and standard deviation."""

    mean: float
    std: float

    @property
    def log_sigma(self) -> float:
        """Standard deviation of log(value)."""
        ratio = self.std / self.mean
        # log1p(r^2) overflows for r beyond ~1e154; 2 log r is its value there to double precision.
        return math.sqrt(2.0 * math.log(ratio) if ratio > 1e150 else math.log1p(ratio * ratio))

    @property
    def log_mu(self) -> float:
        """Mean of log(value)."""
        return math.log(self.mean) - 0.5 * self.log_sigma**2

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        return rng.lognormal(self.log_mu, self.log_sigma, size=n)

    def support(self) -> tuple[float, float]:
        # Strictly positive: the lower end 0 is never reached.
        return math.ulp(0.0), math.inf


@dataclass(frozen=True)
class FileValues:
    """One value per cell, read from a file when the scenario was loaded."""

    path: Path
    values: np.ndarray = field(repr=False, compare=False)

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """Return a copy of the file's values (``n`` must equal their count)."""
        if n != self.values.size:
            raise ValueError(f"{self.path} holds {self.values.size} values, {n} asked for")
        return self.values.copy()

    def support(self) -> tuple[float, float]:
        return float(self.values.min()), float(self.values.max())


ValueSpec = Constant | Uniform | Normal | LogNormal | FileValues


def type_name(x) -> str:
    """The TOML name of a parsed value's type, for messages."""
    return {bool: "boolean", int: "integer", float: "number", str: "string", dict: "table",
            list: "array"}.get(type(x), type(x).__name__)


def finite_number(raw, where: str) -> float:
    """A finite float from a TOML value, or an InputError naming ``where``."""
    if isinstance(raw, bool) or not isinstance(raw, (int, float)):
        raise InputError(f"{where}: must be a number, got {type_name(raw)} {raw!r}")
    value = float(raw)
    if not math.isfinite(value):
        raise InputError(f"{where}: must be finite, got {value}")
    return value


def _allowed_keys(where: str, table: dict, allowed: tuple[str, ...], required: tuple[str, ...]):
    for key in table:
        if key not in allowed:
            close = difflib.get_close_matches(key, allowed, n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise InputError(f"{where}.{key}: unknown key{hint}; allowed here: {', '.join(allowed)}")
    for key in required:
        if key not in table:
            raise InputError(f"{where}: missing key '{key}'")


def read_column_file(path: Path, where: str) -> np.ndarray:
    """Read one value per cell from ``.npy`` (1-D) or ``.csv``/``.txt`` (one column).

    Parameters
    ----------
    path : Path
        File to read.
    where : str
        Prefix for error messages (``"demo.toml: group[0].initial.v_mv"``).

    Returns
    -------
    ndarray of float64, shape (n,)
    """
    if not path.is_file():
        raise InputError(f"{where}: file not found: {path}")
    suffix = path.suffix.lower()
    try:
        if suffix == ".npy":
            values = np.load(path, allow_pickle=False)
        elif suffix in (".csv", ".txt"):
            sep = "," if suffix == ".csv" else r"\s+"
            frame = pd.read_csv(path, header=None, sep=sep, comment="#", dtype=str)
            if frame.shape[1] != 1:
                raise InputError(f"{where}: {path.name} must hold one column, found {frame.shape[1]}")
            column = pd.to_numeric(frame[0], errors="coerce")
            # A non-numeric first row is a header line.
            if len(column) and math.isnan(column.iloc[0]) and frame[0].iloc[0].strip().lower() != "nan":
                column = column.iloc[1:]
            values = column.to_numpy(dtype=np.float64)
        else:
            raise InputError(f"{where}: {path.name}: expected a .npy, .csv or .txt file")
    except InputError:
        raise
    except (OSError, ValueError, pd.errors.ParserError) as exc:
        raise InputError(f"{where}: cannot read {path.name}: {exc}") from None
    values = np.asarray(values)
    if values.ndim == 2 and values.shape[1] == 1:
        values = values[:, 0]
    if values.ndim != 1 or not np.issubdtype(values.dtype, np.number):
        raise InputError(f"{where}: {path.name} must hold a 1-D array of numbers, got shape {values.shape}")
    values = values.astype(np.float64)
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        raise InputError(f"{where}: {path.name}: value {bad[0]} is not a finite number ({values[bad[0]]})")
    return values


def parse_value_spec(raw, where: str, base_dir: Path, n_values: int | None = None) -> ValueSpec:
    """Turn a raw TOML value into a value specification.

    Parameters
    ----------
    raw : int, float or dict
        The value as read from the TOML file.
    where : str
        File and key path for error messages (``"demo.toml: pathway[0].delay_ms"``).
    base_dir : Path
        Directory that ``file`` paths are relative to (the scenario's directory).
    n_values : int or None
        Number of values a ``file`` must hold (the group size); None forbids files.

    Raises
    ------
    InputError
        Wrong type, unknown or missing key, non-finite number, inconsistent bounds,
        unreadable file or wrong number of values in it.
    """
    if not isinstance(raw, dict):
        return Constant(finite_number(raw, where))
    if "file" in raw:
        _allowed_keys(where, raw, ("file",), ("file",))
        if n_values is None:
            raise InputError(f"{where}: a file of per-cell values is not allowed here")
        if not isinstance(raw["file"], str):
            raise InputError(f"{where}.file: must be a string path")
        path = (base_dir / raw["file"]).resolve()
        values = read_column_file(path, f"{where}.file")
        if values.size != n_values:
            raise InputError(
                f"{where}.file: {path.name} holds {values.size} values, expected {n_values} (one per cell)")
        return FileValues(path, values)
    if "distribution" not in raw:
        raise InputError(f"{where}: a table value needs 'distribution' (one of {', '.join(DISTRIBUTIONS)}) or 'file'")
    kind = raw["distribution"]
    if kind not in DISTRIBUTIONS:
        close = difflib.get_close_matches(str(kind), DISTRIBUTIONS, n=1)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        raise InputError(f"{where}.distribution: unknown distribution {kind!r}{hint}; "
                         f"known: {', '.join(DISTRIBUTIONS)}")
    if kind == "uniform":
        _allowed_keys(where, raw, ("distribution", "low", "high"), ("low", "high"))
        low, high = finite_number(raw["low"], f"{where}.low"), finite_number(raw["high"], f"{where}.high")
        if not low <= high:
            raise InputError(f"{where}: low must not exceed high, got low={low}, high={high}")
        return Uniform(low, high)
    if kind == "normal":
        _allowed_keys(where, raw, ("distribution", "mean", "std", "low", "high"), ("mean", "std"))
        mean, std = finite_number(raw["mean"], f"{where}.mean"), finite_number(raw["std"], f"{where}.std")
        if std < 0:
            raise InputError(f"{where}.std: must not be negative, got {std}")
        low = finite_number(raw["low"], f"{where}.low") if "low" in raw else -math.inf
        high = finite_number(raw["high"], f"{where}.high") if "high" in raw else math.inf
        if not low < high:
            raise InputError(f"{where}: low must be below high, got low={low}, high={high}")
        if std == 0 and not low <= mean <= high:
            raise InputError(f"{where}: with std = 0 the mean {mean} must lie within [low, high]")
        if std > 0 and stats.norm.cdf((high - mean) / std) - stats.norm.cdf((low - mean) / std) <= 0:
            raise InputError(f"{where}: [low, high] = [{low}, {high}] lies too far from mean {mean} "
                             f"for std {std} (no probability inside)")
        return Normal(mean, std, low, high)
    _allowed_keys(where, raw, ("distribution", "mean", "std"), ("mean", "std"))
    mean, std = finite_number(raw["mean"], f"{where}.mean"), finite_number(raw["std"], f"{where}.std")
    if mean <= 0:
        raise InputError(f"{where}.mean: a lognormal mean must be positive, got {mean}")
    if std < 0:
        raise InputError(f"{where}.std: must not be negative, got {std}")
    return LogNormal(mean, std)


def check_sign(spec: ValueSpec, where: str, *, positive: bool = False, nonnegative: bool = False) -> None:
    """Raise InputError unless every value ``spec`` can produce has the required sign.

    A normal distribution without a lower bound can produce any value, so it
    fails both checks: give it a ``low`` bound.
    """
    lo, _ = spec.support()
    if positive and not lo > 0:
        raise InputError(f"{where}: must be positive, {_describe_low(spec, lo)}")
    if nonnegative and not lo >= 0:
        raise InputError(f"{where}: must not be negative, {_describe_low(spec, lo)}")


def _describe_low(spec: ValueSpec, lo: float) -> str:
    if isinstance(spec, Constant):
        return f"got {_fmt(spec.value)}"
    if isinstance(spec, Normal) and math.isinf(lo):
        return "but a normal distribution without a 'low' bound can take any value; give 'low'"
    if isinstance(spec, FileValues):
        return f"but {spec.path.name} holds {_fmt(lo)}"
    return f"but the distribution reaches {_fmt(lo)}"


def _fmt(x: float) -> str:
    if math.isfinite(x) and x == int(x) and abs(x) < 1e15:
        return str(int(x))
    return f"{x:g}"
