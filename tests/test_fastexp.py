"""The vectorisable exp of spikegauge.models.fastexp, checked against the C library's exp.

The reference is ``np.exp`` called inside a numba loop, which numba compiles
to a call of the C library's exp (glibc here: made outside this project, within
about 0.5 ulp of the exact value); it is also what the model kernels called
before. The ``numpy.exp`` ufunc on arrays is not used as the reference: on
AVX-512 machines it runs numpy's own SIMD code, off by up to about 0.65 ulp.
"""
from pathlib import Path

import numba
import numpy as np
import pytest

from spikegauge.models.fastexp import exp

SMALLEST_NORMAL = np.finfo(np.float64).tiny
SUBNORMAL_SPACING = np.nextafter(0.0, 1.0)


@numba.njit
def exp_loop(x):
    out = np.empty_like(x)
    for i in range(x.size):
        out[i] = exp(x[i])
    return out


@numba.njit
def libm_exp_loop(x):
    out = np.empty_like(x)
    for i in range(x.size):
        out[i] = np.exp(x[i])
    return out


@numba.njit(parallel=True)
def exp_prange(x):
    out = np.empty_like(x)
    for i in numba.prange(x.size):
        out[i] = exp(x[i])
    return out


def hh_rates(v):
    """Hodgkin-Huxley alpha_n and beta_m of each cell, over chunks of cells as the drivers do."""
    n_chunks = 4
    alpha_n = np.empty_like(v)
    beta_m = np.empty_like(v)
    for c in numba.prange(n_chunks):
        for i in range(c * v.size // n_chunks, (c + 1) * v.size // n_chunks):
            alpha_n[i] = 0.01 * (v[i] + 55.0) / (1.0 - exp(-(v[i] + 55.0) / 10.0))
            beta_m[i] = 4.0 * exp(-(v[i] + 65.0) / 18.0)
    return alpha_n, beta_m


hh_rates_serial = numba.njit(hh_rates)
hh_rates_parallel = numba.njit(parallel=True)(hh_rates)


def max_relative_error(x):
    reference = libm_exp_loop(x)
    return np.max(np.abs(exp_loop(x) - reference) / reference)


def neighbours(x0, count):
    """The 2*count+1 consecutive doubles centred on x0, ascending."""
    bits = np.array(x0, dtype=np.float64).view(np.int64) + np.arange(-count, count + 1)
    return np.sort(bits.view(np.float64))


def test_accuracy_over_normal_range():
    rng = np.random.default_rng(20261202)
    assert max_relative_error(np.linspace(-700.0, 700.0, 10**6)) <= 1e-15
    assert max_relative_error(rng.uniform(-700.0, 700.0, 10**6)) <= 1e-15


def test_accuracy_over_model_range():
    # HH rate arguments: exp(-(V + 40)/10) and the like, V in [-120, 80] mV.
    assert max_relative_error(np.linspace(-50.0, 50.0, 10**6)) <= 1e-15
    assert max_relative_error(np.linspace(-1e-3, 1e-3, 10**5)) <= 1e-15


def test_subnormal_outputs():
    x = np.linspace(-745.2, -708.0, 10**6)
    got = exp_loop(x)
    reference = libm_exp_loop(x)
    assert np.all((got == 0.0) == (reference == 0.0))
    assert np.max(np.abs(got - reference)) <= SUBNORMAL_SPACING
    # One spacing is 1e-13 of the value down to about 5e-311.
    large = reference >= 1e-310
    assert np.max(np.abs(got - reference)[large] / reference[large]) <= 1e-13


@pytest.mark.parametrize("x, expected", [
    (0.0, 1.0),
    (-0.0, 1.0),
    (np.inf, np.inf),
    (-np.inf, 0.0),
    (1e300, np.inf),
    (-1e300, 0.0),
    (710.0, np.inf),
    (-746.0, 0.0),
])
def test_special_values(x, expected):
    assert exp_loop(np.array([x]))[0] == expected


def test_nan():
    assert np.isnan(exp_loop(np.array([np.nan, -np.nan]))).all()


def test_overflow_threshold():
    largest_finite = 709.782712893384      # log(DBL_MAX) rounded to double
    x = np.array([largest_finite, np.nextafter(largest_finite, np.inf)])
    got = exp_loop(x)
    assert np.isfinite(got[0]) and got[0] == libm_exp_loop(x)[0]
    assert got[1] == np.inf


def test_underflow_threshold():
    last_nonzero = -745.1332191019411      # exp rounds to the smallest subnormal here
    x = np.array([last_nonzero, np.nextafter(last_nonzero, -np.inf)])
    got = exp_loop(x)
    assert got[0] == SUBNORMAL_SPACING
    assert got[1] == 0.0


@pytest.mark.parametrize("centre", [
    0.5 * np.log(2.0), -0.5 * np.log(2.0), 1000.5 * np.log(2.0), -1073.5 * np.log(2.0),
    2.0**-53, -40.0, 36.0, 700.0,
])
def test_monotone_over_consecutive_doubles(centre):
    # k*ln2 +- ln2/2 is where the reduction switches k: the likeliest place for a step back.
    y = exp_loop(neighbours(centre, 2000))
    assert np.all(np.diff(y) >= 0.0)


def test_monotone_on_fine_grid():
    y = exp_loop(np.linspace(-60.0, 60.0, 10**6))
    assert np.all(np.diff(y) > 0.0)


def test_inside_prange():
    x = np.linspace(-50.0, 50.0, 10**5)
    assert np.array_equal(exp_prange(x), exp_loop(x))
    v = np.linspace(-120.0, 80.0, 10**5) + 1e-7          # keeps off V = -55 exactly
    alpha_n, beta_m = hh_rates_parallel(v)
    serial_alpha_n, serial_beta_m = hh_rates_serial(v)
    assert np.array_equal(alpha_n, serial_alpha_n) and np.array_equal(beta_m, serial_beta_m)
    # alpha_n loses digits to 1 - exp(...) near V = -55 mV; hence the looser tolerance there.
    np.testing.assert_allclose(
        alpha_n, 0.01 * (v + 55.0) / (1.0 - libm_exp_loop(-(v + 55.0) / 10.0)), rtol=1e-10)
    np.testing.assert_allclose(beta_m, 4.0 * libm_exp_loop(-(v + 65.0) / 18.0), rtol=1e-15)


STRICT_CHECK = """
import sys
import numpy as np
import spikegauge
run = spikegauge.simulate("scenarios/demo-hh.toml", strategy="fixed", stepper="rk4", dt_ms=0.025,
                          crossing="hermite", delivery="grid", t_stop_ms=200.0, threads=1)
np.save(sys.argv[1], np.column_stack([run.spikes["cell"], run.spikes["time_ms"]]))
"""


def test_spike_times_within_1e_9_ms_of_the_strict_build(tmp_path):
    """The models built with this exp against the same models built with the C library's
    exp (the switch ``SPIKEGAUGE_STRICT_EXP=1``, which is part of the kernel cache key):
    a Hodgkin-Huxley network's spikes must agree within 1e-9 ms (issue target)."""
    import os
    import subprocess
    import sys

    from spikegauge._numba import STRICT_EXP_ENV

    out = {}
    for flag in ("", "1"):
        path = tmp_path / f"spikes{flag}.npy"
        env = {k: v for k, v in os.environ.items() if k != STRICT_EXP_ENV}
        if flag:
            env[STRICT_EXP_ENV] = flag
        subprocess.run([sys.executable, "-c", STRICT_CHECK, str(path)], check=True, env=env,
                       cwd=Path(__file__).resolve().parents[1])
        out[flag] = np.load(path)
    fast, strict = out[""], out["1"]
    assert strict.shape[0] > 100
    np.testing.assert_array_equal(fast[:, 0], strict[:, 0])
    gap = np.abs(fast[:, 1] - strict[:, 1]).max()
    assert gap <= 1e-9, gap
