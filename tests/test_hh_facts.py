"""Published facts of the two Hodgkin-Huxley-type models, recomputed.

The package's right-hand side is integrated with ``scipy.integrate.solve_ivp``
(DOP853) through a compiled wrapper; spikes are solve_ivp events (upward
crossings of the detection voltage). The values checked come from
../shared/CHECKS.md (computed there from the published equations with
scipy), from the papers (named, "from memory" where recalled), and from the
theory of type-I excitability.
"""
from __future__ import annotations

import numba
import numpy as np
import pytest
import scipy.integrate
import scipy.optimize

from spikegauge.models import MODELS, rest_state, steady_state_at
from spikegauge.models.base import P_IEXT, P_VTH
from spikegauge.models.kernels import rhs, split

HH = MODELS["hh-squid"]
WB = MODELS["hh-interneuron"]


@numba.njit
def _f(t, y, code, p):
    out = np.empty_like(y)
    rhs(code, y, p, False, out)
    return out


def _spike(t, y, code, p):
    return y[0] - p[P_VTH]


_spike.direction = 1


def spike_times(spec, i_ext, t_end, y0=None, rtol=1e-8, atol=1e-10, params=None):
    """Spike times (ms) of one cell under constant current ``i_ext`` from ``y0`` (default: rest at 0)."""
    p = (spec.default_params() if params is None else params).copy()
    if y0 is None:
        p[P_IEXT] = 0.0
        y0 = rest_state(spec, p)
    p[P_IEXT] = i_ext
    sol = scipy.integrate.solve_ivp(_f, (0.0, t_end), y0, method="DOP853", rtol=rtol, atol=atol,
                                    args=(spec.code, p), events=_spike)
    assert sol.status == 0
    return sol.t_events[0], sol


# --------------------------------------------------------------------------
# Hodgkin & Huxley 1952 squid axon (values: ../shared/CHECKS.md, computed there)

def test_hh_rest_potential():
    """Rest at -65.0 mV +- 0.05 (CHECKS.md: -64.996, scipy DOP853): relax from an arbitrary state."""
    y0 = np.array([-60.0, 0.1, 0.5, 0.4, 0.0, 0.0])
    times, sol = spike_times(HH, 0.0, 300.0, y0=y0)
    v_end = sol.y[0, -1]
    assert v_end == pytest.approx(-65.0, abs=0.05)
    # rest_state (scipy.optimize.root inside the package) is the same point.
    np.testing.assert_allclose(rest_state(HH, HH.default_params()), sol.y[:, -1], atol=1e-6)


@pytest.mark.parametrize("i_ext, fires", [(6.2, False), (6.3, True)])
def test_hh_repetitive_firing_threshold_from_rest(i_ext, fires):
    """From rest, a 1-s step of 6.2 uA/cm2 gives no spike in the second half-second and
    6.3 uA/cm2 gives steady firing (CHECKS.md; the lowest sustaining current is 6.255-6.26)."""
    times, _ = spike_times(HH, i_ext, 1000.0)
    late = times[times > 500.0]
    if not fires:
        assert late.size == 0
    else:
        # Steady: about 50 Hz (onset near 50 Hz, CHECKS.md) and regular.
        assert late.size >= 20
        isi = np.diff(late)
        assert np.std(isi) < 1e-3 * np.mean(isi)
        assert 45.0 < 1000.0 / isi.mean() < 60.0


def test_hh_rate_at_10_ua():
    """68.3 +- 0.1 Hz at 10 uA/cm2 (CHECKS.md: 68.32 Hz, ISI 14.636 ms); first spike peaks near
    +40.3 mV (CHECKS.md)."""
    times, sol = spike_times(HH, 10.0, 600.0)
    late = np.diff(times[times > 300.0])
    assert 1000.0 / late[-1] == pytest.approx(68.3, abs=0.1)
    first = sol.t < times[0] + 1.0
    assert sol.y[0, first].max() == pytest.approx(40.3, abs=0.5)


def test_hh_rates_scale_with_q10_of_3():
    """Every gating rate at 16.3 deg C is 3x its value at 6.3 deg C, 9x at 26.3 (Hodgkin &
    Huxley 1952 scale rates by 3 per 10 deg C, from memory); V and synapses are unaffected."""
    rng = np.random.default_rng(3)
    slot = HH.param_keys().index("temperature_c")
    for _ in range(10):
        y = np.array([rng.uniform(-90, 40), *rng.uniform(0, 1, 3), *rng.uniform(0, 0.2, 2)])
        out = {}
        for temp in (6.3, 16.3, 26.3):
            p = HH.default_params()
            p[slot] = temp
            d = np.empty(6)
            a = np.empty(6)
            b = np.empty(6)
            rhs(HH.code, y, p, False, d)
            split(HH.code, y, p, False, a, b)
            out[temp] = d, a, b
        for temp, factor in ((16.3, 3.0), (26.3, 9.0)):
            for base, hot in zip(out[6.3], out[temp]):
                np.testing.assert_allclose(hot[1:4], factor * base[1:4], rtol=1e-13)
                np.testing.assert_array_equal(hot[[0, 4, 5]], base[[0, 4, 5]])


# --------------------------------------------------------------------------
# Wang & Buzsaki 1996 interneuron

def _wb_fold():
    """Saddle-node of the resting state: the maximum of the steady-state I-V curve
    I_ss(V) = -C f_V(V, h_inf(V), n_inf(V)) between rest and spike (scipy minimize_scalar)."""
    p = WB.default_params()
    c = p[WB.param_keys().index("c_m_uf_per_cm2")]

    def i_ss(v):
        y = steady_state_at(WB, p[None, :], np.array([v]))[0]
        d = np.empty(WB.n_states)
        rhs(WB.code, y, p, False, d)
        return -c * d[0]

    res = scipy.optimize.minimize_scalar(lambda v: -i_ss(v), bounds=(-64.0, -50.0), method="bounded",
                                         options={"xatol": 1e-10})
    return -res.fun, res.x


def test_wb_rheobase():
    """Threshold current near 0.16 uA/cm2 (Wang & Buzsaki 1996, from memory)."""
    i_c, _ = _wb_fold()
    assert i_c == pytest.approx(0.16, abs=0.01)


def test_wb_is_type_one_with_square_root_onset():
    """Type-I excitability (Wang & Buzsaki 1996 chose phi = 5 to get it, from memory): firing starts
    at the saddle-node of rest with arbitrarily low rate, f ~ sqrt(I - I_c) (saddle-node on an
    invariant circle; Ermentrout 1996, Neural Comput 8:979). Measured: the log-log slope of f against
    I - I_c is 0.5 close to onset."""
    i_c, v_fold = _wb_fold()
    y_fold = steady_state_at(WB, WB.default_params()[None, :], np.array([v_fold]))[0]
    # Below the fold, the cell started at the ghost relaxes to rest: no spike in 2 s.
    below, _ = spike_times(WB, i_c - 2e-3, 2000.0, y0=y_fold)
    assert below.size == 0
    rates = []
    deltas = np.array([1e-4, 4e-4])
    for delta, t_end in zip(deltas, (8000.0, 4000.0)):
        times, _ = spike_times(WB, i_c + delta, t_end, y0=y_fold)
        assert times.size >= 3
        rates.append(1000.0 / np.diff(times)[-1])
    assert rates[0] < 1.0  # below 1 Hz just above onset: no minimum rate
    slope = np.diff(np.log(rates))[0] / np.diff(np.log(deltas))[0]
    assert slope == pytest.approx(0.5, abs=0.02)


def test_wb_rate_at_1_ua():
    """Repetitive firing at tens of Hz for I = 1 uA/cm2 (Wang & Buzsaki 1996, Fig. 1 f-I curve,
    from memory: roughly 60 Hz); loose bounds because the figure is recalled."""
    times, _ = spike_times(WB, 1.0, 1000.0)
    rate = 1000.0 / np.diff(times[times > 500.0]).mean()
    assert 40.0 < rate < 80.0
