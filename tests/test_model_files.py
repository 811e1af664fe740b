"""Model files: generated kernels against closed forms, scipy and the hand-written models.

Outside references, named beside each check: the quadratic integrate-and-fire
closed-form interval (textbook: the integral of C dV / (k (V - a)(V - b) + I)
is an arctangent); scipy.integrate.solve_ivp DOP853 at rtol 1e-12 on the same
equations written out here independently of the model files; scipy's
finite-difference Jacobian (scipy.optimize.approx_fprime).
"""
from __future__ import annotations

import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.integrate
import scipy.optimize

from click.testing import CliRunner

from spikegauge.cli import main  # noqa: F401  (registers every command)
from spikegauge.cli.main import cli
from spikegauge.errors import InputError
from spikegauge.models import load_model_file
from spikegauge.models.kernels import jac, rhs
from spikegauge.scenario import parse_scenario
from spikegauge.simulation import simulate

ROOT = Path(__file__).resolve().parents[1]
MODELS_DIR = ROOT / "scenarios" / "models"
TEST_MODELS = Path(__file__).resolve().parent / "data" / "models"


def one_group(model_path, n_cells=1, duration_ms=300.0, parameters="", initial="", extra=""):
    text = f"""
[scenario]
name = "model-file-test"
duration_ms = {duration_ms}
seed = 5
[[group]]
name = "cells"
size = {n_cells}
model = "{model_path}"
[group.parameters]
{parameters}
[group.initial]
{initial}
{extra}
"""
    return parse_scenario(text, source=ROOT / "tests" / "inline.toml")


def spike_times(run, cell=0):
    s = run.spikes
    return s.time_ms.to_numpy()[s.cell.to_numpy() == cell]


def dop853_spikes(f, y0, t_stop, threshold_index, threshold, reset=None, refractory=0.0):
    """Spike times of one cell by scipy DOP853 (rtol 1e-12), restarting at each reset."""
    def crossing(t, y):
        return y[threshold_index] - threshold
    crossing.terminal = reset is not None
    crossing.direction = 1.0
    t, y, spikes = 0.0, np.asarray(y0, float), []
    while t < t_stop:
        sol = scipy.integrate.solve_ivp(f, (t, t_stop), y, method="DOP853", rtol=1e-12, atol=1e-12,
                                        events=crossing)
        if reset is None:
            return np.asarray(sol.t_events[0])
        if sol.status != 1:
            break
        t = float(sol.t_events[0][0])
        spikes.append(t)
        y = reset(np.asarray(sol.y_events[0][0], float))
        t += refractory
    return np.asarray(spikes)


# ---------------------------------------------------------------------------
# Against outside references


def test_qif_interval_matches_closed_form():
    """QIF: interval = t_ref + C / sqrt(k q) [atan(x sqrt(k/q))] from V_reset to V_peak (textbook)."""
    spec = load_model_file(MODELS_DIR / "qif.toml")
    p = {x.key: x.default for x in spec.params}
    i_bias = 200.0  # rheobase k (V_crit - V_rest)^2 / 4 = 28.1 pA; an interval of about 42 ms
    run = simulate(one_group(MODELS_DIR / "qif.toml", parameters=f"i_bias_pa = {i_bias}"),
                   strategy="local-adaptive", stepper="dp54", rtol=1e-11)
    c, k = p["c_m_pf"], p["k_nsiemens_per_mv"]
    mid, half = 0.5 * (p["v_rest_mv"] + p["v_crit_mv"]), 0.5 * (p["v_crit_mv"] - p["v_rest_mv"])
    q = i_bias - k * half ** 2
    assert q > 0
    r = math.sqrt(k / q)
    travel = c / math.sqrt(k * q) * (math.atan((p["v_peak_mv"] - mid) * r) - math.atan((p["v_reset_mv"] - mid) * r))
    isi = np.diff(spike_times(run))
    assert isi.size >= 5
    np.testing.assert_allclose(isi, p["t_ref_ms"] + travel, rtol=0, atol=1e-6)


@pytest.mark.parametrize("kind, a, d", [("regular", 0.02, 8.0), ("fast", 0.1, 2.0)])
def test_izhikevich_cells_match_dop853(kind, a, d):
    """Izhikevich 2003 RS and FS cells against scipy DOP853 (rtol 1e-12) on the equations written here."""
    i_bias, b, c = 10.0, 0.2, -65.0
    run = simulate(one_group(MODELS_DIR / "izhikevich.toml", parameters=f"i_bias = {i_bias}\na = {a}\nd = {d}"),
                   strategy="local-adaptive", stepper="dp54", rtol=1e-11)

    def f(t, y):
        v, u = y
        return [0.04 * v * v + 5 * v + 140 - u + i_bias, a * (b * v - u)]

    ref = dop853_spikes(f, [-65.0, b * -65.0], 300.0, 0, 30.0,
                        reset=lambda y: np.array([c, y[1] + d]))
    got = spike_times(run)
    assert ref.size >= 5 and got.size == ref.size
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-6)


def traub_rhs(i_bias):
    """The Traub-Miles-type HH cell of Brette et al. 2007 (Appendix), written out here."""
    vt = -63.0

    def vtrap(x, y):  # x / (exp(x / y) - 1) with its limit y at x = 0
        return y if abs(x) < 1e-9 else x / math.expm1(x / y)

    def f(t, s):
        v, m, h, n = s
        am = 0.32 * vtrap(13 - v + vt, 4)
        bm = 0.28 * vtrap(v - vt - 40, 5)
        ah = 0.128 * math.exp((17 - v + vt) / 18)
        bh = 4 / (1 + math.exp((40 - v + vt) / 5))
        an = 0.032 * vtrap(15 - v + vt, 5)
        bn = 0.5 * math.exp((10 - v + vt) / 40)
        i_ion = 0.05 * (-60 - v) - 100 * m ** 3 * h * (v - 50) - 30 * n ** 4 * (v + 90)
        return [i_ion + i_bias, am * (1 - m) - bm * m, ah * (1 - h) - bh * h, an * (1 - n) - bn * n]

    def steady(v):
        am, bm = 0.32 * vtrap(13 - v + vt, 4), 0.28 * vtrap(v - vt - 40, 5)
        ah, bh = 0.128 * math.exp((17 - v + vt) / 18), 4 / (1 + math.exp((40 - v + vt) / 5))
        an, bn = 0.032 * vtrap(15 - v + vt, 5), 0.5 * math.exp((10 - v + vt) / 40)
        return [v, am / (am + bm), ah / (ah + bh), an / (an + bn)]

    return f, steady


def test_traub_hh_cell_matches_dop853():
    """The Traub-Miles-type HH model file against scipy DOP853 (rtol 1e-12): spike times within 1e-6 ms."""
    i_bias = 1.0
    run = simulate(one_group(MODELS_DIR / "traub-hh.toml", parameters=f"i_bias_ua_per_cm2 = {i_bias}",
                             initial="v_mv = -65.0"),
                   strategy="local-adaptive", stepper="dp54", rtol=1e-11)
    f, steady = traub_rhs(i_bias)
    ref = dop853_spikes(f, steady(-65.0), 300.0, 0, -20.0)
    got = spike_times(run)
    assert ref.size >= 3 and got.size == ref.size
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-6)


LIF_JUMP = dict(tau_m_ms=20.0, e_l_mv=-49.0, v_th_mv=-50.0, v_reset_mv=-60.0, t_ref_ms=5.0)  # the file's defaults


@pytest.mark.parametrize("settings", [
    dict(strategy="local-adaptive", stepper="dp54", rtol=1e-11),
    dict(strategy="fixed", stepper="rk4", dt_ms=0.01, crossing="hermite", delivery="exact"),
], ids=["local-adaptive", "fixed"])
def test_lif_jump_cell_without_input_fires_at_the_closed_form_interval(settings):
    """lif-jump alone: V(t) = V_inf + (V0 - V_inf) exp(-t / tau_m) (closed form), so from V0 = V_reset
    the first spike comes at tau_m ln((V_inf - V_reset)/(V_inf - V_th)) and then every
    t_ref + that time."""
    p = LIF_JUMP
    run = simulate(one_group(MODELS_DIR / "lif-jump.toml", initial=f"v_mv = {p['v_reset_mv']}"), **settings)
    travel = p["tau_m_ms"] * math.log((p["e_l_mv"] - p["v_reset_mv"]) / (p["e_l_mv"] - p["v_th_mv"]))
    got = spike_times(run)
    assert got.size == 5   # 300 ms: 47.96 ms to the first spike, then every 52.96 ms
    np.testing.assert_allclose(got, travel + np.arange(5) * (p["t_ref_ms"] + travel), rtol=0, atol=1e-6)


def lif_jump_event_driven(arrivals, t_stop, tau_m, e_l, v_th, v_reset, t_ref, v0):
    """Spike times of one lif-jump cell by its closed form between arrivals (event-driven).

    ``arrivals`` is a time-sorted list of (time_ms, jump_mv). Between arrivals
    V relaxes exponentially towards ``e_l``; the threshold crossing of the
    relaxation is solved in closed form. Asserts the conditions under which the
    solution is unambiguous: no arrival falls inside a refractory period and no
    jump itself carries V over the threshold.
    """
    t, v, spikes = 0.0, v0, []
    for ta, w in list(arrivals) + [(t_stop, 0.0)]:
        while e_l > v_th:
            tc = t + tau_m * math.log((e_l - v) / (e_l - v_th))
            if tc >= ta:
                break
            spikes.append(tc)
            t, v = tc + t_ref, v_reset
            assert t < ta, "an arrival inside a refractory period"
        v = e_l + (v - e_l) * math.exp(-(ta - t) / tau_m) + w
        t = ta
        assert v < v_th, "a jump over the threshold"
    return np.asarray(spikes)


def test_lif_jump_cell_under_a_periodic_input_train_matches_the_event_driven_solution(tmp_path):
    """lif-jump under periodic excitatory and inhibitory arrivals against the event-driven solution above."""
    p = LIF_JUMP
    # +0.25 mV every 8 ms and -2.25 mV every 24 ms (the benchmark's jumps), phases chosen so that
    # no arrival meets a refractory period and no jump crosses the threshold (asserted below)
    exc = np.arange(1.5, 300.0, 8.0)
    inh = np.arange(1.0, 300.0, 24.0)
    for name, times in (("exc.csv", exc), ("inh.csv", inh)):
        (tmp_path / name).write_text("cell,time_ms\n" + "".join(f"0,{float(t)!r}\n" for t in times))
    extra = "".join(f"""
[[drive]]
target = "cells"
kind = "spikes"
receptor = "{receptor}"
weight_mv = {w}
file = "{tmp_path / name}"
""" for receptor, w, name in (("excitatory", 0.25, "exc.csv"), ("inhibitory", 2.25, "inh.csv")))
    sc = one_group(MODELS_DIR / "lif-jump.toml", initial="v_mv = -60.0", extra=extra)
    arrivals = sorted([(t, 0.25) for t in exc] + [(t, -2.25) for t in inh])
    ref = lif_jump_event_driven(arrivals, 300.0, p["tau_m_ms"], p["e_l_mv"], p["v_th_mv"], p["v_reset_mv"],
                                p["t_ref_ms"], -60.0)
    assert ref.size >= 3
    for settings in (dict(strategy="local-adaptive", stepper="dp54", rtol=1e-11),
                     dict(strategy="global-adaptive", stepper="dp54", rtol=1e-11),
                     dict(strategy="fixed", stepper="rk4", dt_ms=0.01, crossing="hermite", delivery="exact")):
        got = spike_times(simulate(sc, **settings))
        assert got.size == ref.size, settings
        np.testing.assert_allclose(got, ref, rtol=0, atol=1e-6, err_msg=str(settings))


@pytest.mark.parametrize("name, state", [
    ("traub-hh.toml", [-55.0, 0.1, 0.6, 0.3, 0.02, 0.1]),
    ("izhikevich.toml", [-60.0, -12.0, 3.0, 1.0]),
    ("qif.toml", [-58.0, 40.0, 10.0]),
])
def test_generated_jacobian_matches_finite_differences(name, state):
    """Generated Jacobian against scipy.optimize.approx_fprime of the generated right-hand side."""
    spec = load_model_file(MODELS_DIR / name)
    p = spec.default_params()
    spec.extra["derive"](p[None, :])
    y = np.array(state)
    n = spec.n_states

    def f_i(i):
        def g(x):
            out = np.zeros(n)
            rhs(spec.code, np.ascontiguousarray(x), p, False, out)
            return out[i]
        return g

    J = np.zeros((n, n))
    jac(spec.code, y, p, False, J)
    scale = np.maximum(np.abs(y), 1e-3)
    for i in range(n):
        fd = scipy.optimize.approx_fprime(y, f_i(i), 1e-7 * scale)
        np.testing.assert_allclose(J[i], fd, rtol=1e-4, atol=1e-6 * max(1.0, np.abs(fd).max()))


# ---------------------------------------------------------------------------
# A model file runs like the hand-written model it restates


def _demo_text(scenario, built_in, model):
    text = (ROOT / "scenarios" / scenario).read_text()
    return text.replace(f'model = "{built_in}"', f'model = "{model}"')


SETTINGS = [
    dict(strategy="fixed", stepper="rk2", dt_ms=0.025, crossing="linear", delivery="grid"),
    dict(strategy="fixed", stepper="rk4", dt_ms=0.05, crossing="hermite", delivery="exact"),
    dict(strategy="fixed", stepper="expeuler", dt_ms=0.025, crossing="linear", delivery="grid"),
    dict(strategy="fixed", stepper="backward-euler", dt_ms=0.025, crossing="step", delivery="grid"),
    dict(strategy="local-adaptive", stepper="dp54", rtol=1e-6),
    dict(strategy="local-adaptive", stepper="rodas3", rtol=1e-5),
    dict(strategy="global-adaptive", stepper="bs32", rtol=1e-5),
]
BUILT_IN_AS_FILES = [  # scenario, built-in model, its model file, span (ms)
    ("demo-lif.toml", "lif-current", "lif-current.toml", 150.0),
    ("demo-lif-conductance.toml", "lif-conductance", "lif-conductance.toml", 150.0),
    ("demo-hh.toml", "hh-squid", "hh-squid.toml", 60.0),
]


@pytest.mark.parametrize("scenario, built_in, model_file, span", BUILT_IN_AS_FILES,
                         ids=[c[1] for c in BUILT_IN_AS_FILES])
@pytest.mark.parametrize("settings", SETTINGS, ids=lambda s: f"{s['strategy']}-{s['stepper']}")
def test_built_in_model_as_a_model_file_reproduces_it(settings, scenario, built_in, model_file, span):
    """Before/after rule of the design notes: same spike counts, times within 1e-9 ms (short, non-chaotic span).

    The model files list their parameters in the built-in models' slot order where the
    scenario draws one from a distribution: its random stream is named after the slot.
    """
    source = ROOT / "scenarios" / "x.toml"
    a = simulate(parse_scenario(_demo_text(scenario, built_in, built_in), source=source),
                 t_stop_ms=span, **settings)
    b = simulate(parse_scenario(_demo_text(scenario, built_in, TEST_MODELS / model_file), source=source),
                 t_stop_ms=span, **settings)
    assert a.status == b.status == "ok"
    assert len(a.spikes) == len(b.spikes) > 5
    np.testing.assert_array_equal(a.spikes.cell.to_numpy(), b.spikes.cell.to_numpy())
    np.testing.assert_allclose(a.spikes.time_ms.to_numpy(), b.spikes.time_ms.to_numpy(), rtol=0, atol=1e-9)


def test_inhibitory_input_that_decrements_lowers_the_voltage():
    """lif-jump: '-v_mv' makes an inhibitory arrival of weight 2.25 lower V by 2.25 mV (the benchmark's jump)."""
    extra = """
[[drive]]
target = "cells"
kind = "spikes"
receptor = "{receptor}"
weight_mv = 2.25
file = "{file}"
"""
    spikes_file = ROOT / "tests" / "data" / "one_input_at_10ms.csv"
    assert spikes_file.exists()
    for receptor, sign in (("excitatory", 1.0), ("inhibitory", -1.0)):
        sc = one_group(MODELS_DIR / "lif-jump.toml", duration_ms=12.0, parameters="e_l_mv = -60.0",
                       initial="v_mv = -60.0",
                       extra=extra.format(receptor=receptor, file=spikes_file))
        run = simulate(sc, strategy="fixed", stepper="rk4", dt_ms=0.01, crossing="linear", delivery="exact",
                       record_cells=[0], record_interval_ms=1.0)
        v = run.traces.set_index("time_ms")["state0"]  # state 0 is the spike state, V
        assert v.loc[9.0] == pytest.approx(-60.0, abs=1e-9)
        assert v.loc[11.0] == pytest.approx(-60.0 + sign * 2.25 * math.exp(-1.0 / 20.0), abs=1e-6)


# ---------------------------------------------------------------------------
# Bad input: one line naming the file, the key and the problem


GOOD = (MODELS_DIR / "qif.toml").read_text()

BAD = [
    ("unknown symbol", GOOD.replace('"-i_exc_pa / tau_exc_ms"', '"-i_exc_pa / tau_nope_ms"'),
     "derivatives.i_exc_pa", "unknown name 'tau_nope_ms'"),
    ("syntax error", GOOD.replace('"-i_exc_pa / tau_exc_ms"', '"-i_exc_pa / (tau_exc_ms"'),
     "derivatives.i_exc_pa", "syntax error"),
    ("unknown state derivative", GOOD.replace('i_inh_pa = "-i_inh_pa / tau_inh_ms"',
                                              'i_inh_pa = "-i_inh_pa / tau_inh_ms"\nw_pa = "0"'),
     "derivatives.w_pa", "not a state"),
    ("state without derivative", GOOD.replace('i_inh_pa = "-i_inh_pa / tau_inh_ms"', ''),
     "derivatives", "'i_inh_pa' has no derivative"),
    ("threshold on a missing state", GOOD.replace('state = "v_mv"', 'state = "u_mv"'),
     "spike.state", "'u_mv' is not a state"),
    ("foreign unit suffix", GOOD.replace("c_m_pf = { default", "c_m_uf_per_cm2 = { default"),
     "parameters.c_m_uf_per_cm2", "does not fit point units"),
    ("not TOML", "[model\nname = 1", "not a TOML file", ""),
    ("nanoseconds for nanosiemens", GOOD.replace("k_nsiemens_per_mv", "k_ns_per_mv"),
     "parameters.k_ns_per_mv", "a conductance spells siemens"),
    ("function call", GOOD.replace('"v_peak_mv"', '"__import__(v_peak_mv)"'),
     "spike.threshold", "unknown function '__import__'"),
    ("attribute", GOOD.replace('"v_peak_mv"', '"v_peak_mv.real"'), "spike.threshold", "Attribute is not allowed"),
    ("state in threshold", GOOD.replace('threshold = "v_peak_mv"', 'threshold = "v_mv"'),
     "spike.threshold", "only parameters may appear here"),
    ("division by zero", GOOD.replace('"-i_exc_pa / tau_exc_ms"', '"-i_exc_pa / 0"'),
     "derivatives.i_exc_pa", "not a finite real expression"),
    ("default outside range", GOOD.replace("default = 200.0, lower = 0.0", "default = -1.0, lower = 0.0"),
     "parameters.c_m_pf.default", "outside its declared range"),
]


@pytest.mark.parametrize("case, text, key, message", BAD, ids=[b[0] for b in BAD])
def test_bad_model_file_one_line(tmp_path, case, text, key, message):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(InputError) as exc:
        load_model_file(path)
    line = str(exc.value)
    assert "\n" not in line and line.startswith(str(path)) and key in line and message in line


def test_scenario_value_outside_declared_range_is_refused():
    with pytest.raises(InputError, match=r"group\[0\]\.parameters\.c_m_pf: values must lie within \[0, inf\]"):
        one_group(MODELS_DIR / "qif.toml", parameters="c_m_pf = -5.0")


def test_two_different_model_files_with_one_name_are_refused(tmp_path):
    (tmp_path / "a.toml").write_text(GOOD)
    (tmp_path / "b.toml").write_text(GOOD.replace("v_peak_mv = 20.0", "v_peak_mv = 25.0"))
    text = ('[scenario]\nname = "x"\nduration_ms = 10.0\nseed = 1\n'
            '[[group]]\nname = "a"\nsize = 1\nmodel = "a.toml"\n'
            '[[group]]\nname = "b"\nsize = 1\nmodel = "b.toml"\n')
    with pytest.raises(InputError, match=r"group\[1\]\.model: .*b\.toml and .*a\.toml are different model files "
                                         r"with the same name 'qif-example'"):
        parse_scenario(text, source=tmp_path / "net.toml")


def test_cli_reports_a_bad_model_file_with_exit_2(tmp_path):
    (tmp_path / "bad.toml").write_text(BAD[0][1])
    (tmp_path / "net.toml").write_text(
        '[scenario]\nname = "x"\nduration_ms = 10.0\nseed = 1\n[[group]]\nname = "a"\nsize = 1\nmodel = "bad.toml"\n')
    for args in (["models", str(tmp_path / "bad.toml")],
                 ["simulate", str(tmp_path / "net.toml"), "--out", str(tmp_path / "out")]):
        res = CliRunner().invoke(cli, args)
        assert res.exit_code == 2, res.output
        assert "Traceback" not in res.output
        assert "derivatives.i_exc_pa" in res.output and "unknown name 'tau_nope_ms'" in res.output


def test_cli_shows_a_model_files_equations_and_keys():
    res = CliRunner().invoke(cli, ["models", str(MODELS_DIR / "izhikevich.toml")])
    assert res.exit_code == 0, res.output
    for text in ("dv_mv/dt = ", "at a spike: u <- d + u", "weight key ([[pathway]], [[drive]]): weight",
                 "current key ([[drive]] kinds bias and step): i", "c_mv"):
        assert text in res.output, text
    assert "spike.threshold" not in res.output  # derived slots are not keys a scenario may set


def test_fuzzed_model_files_never_raise_anything_but_input_error():
    """600 mutated model files: each either reads or fails with InputError (no traceback)."""
    from spikegauge.models.model_file import read_model_text

    rng = np.random.default_rng(2026)
    pieces = ["(", ")", "**", "*", "/", "-", "+", "exp(", "log(", "safe_ratio(", "min(", "max(", "1e308", "0",
              "v_mv", "u", "=", '"', "[", "]", "{", "}", ",", "\n", "nan", "inf", "1/0", "__", ".", "lambda",
              "import", "#", "'", "\\", "state", "reset", "threshold", "-1", "abs(", "sqrt(-1)"]
    outcomes = {"read": 0, "refused": 0}
    for _ in range(600):
        text = list(GOOD)
        for _ in range(int(rng.integers(1, 6))):
            pos = int(rng.integers(0, len(text)))
            action = rng.integers(0, 3)
            if action == 0:
                del text[pos:pos + int(rng.integers(1, 12))]
            else:
                text.insert(pos, pieces[int(rng.integers(0, len(pieces)))])
        try:
            read_model_text("".join(text), "fuzz.toml")
            outcomes["read"] += 1
        except InputError as exc:
            assert "\n" not in str(exc) and str(exc).startswith("fuzz.toml")
            outcomes["refused"] += 1
    assert outcomes["refused"] > 100 and outcomes["read"] > 10, outcomes


# ---------------------------------------------------------------------------
# Compilation, cache and scales


def test_second_process_loads_the_kernels_from_the_cache(tmp_path):
    """A model file compiled once is loaded, not compiled, by the next process."""
    fresh = 200.0 + int.from_bytes(os.urandom(4), "little") / 2**32  # a model never compiled before
    text = GOOD.replace('name = "qif-example"', 'name = "qif-cache-check"').replace("200.0", repr(fresh))
    path = tmp_path / "qif-cache.toml"
    path.write_text(text)
    script = (
        "import importlib, sys\n"
        "from spikegauge.models import load_model_file\n"
        f"spec = load_model_file({str(path)!r})\n"
        "mod = [m for n, m in sys.modules.items() if n.startswith('spikegauge_model_')][-1]\n"
        "print(sum(f.cache_hits for f in (mod.rhs, mod.jac, mod.split, mod.reset)))\n"
    )
    hits = [int(subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                               check=True).stdout.split()[-1]) for _ in range(2)]
    assert hits == [0, 4]


def test_scales_the_file_leaves_out_are_measured_by_a_pilot(tmp_path):
    text = GOOD.replace("{ initial = 0.0, scale = 100.0 }", "0.0").replace('name = "qif-example"',
                                                                            'name = "qif-no-scales"')
    path = tmp_path / "qif-no-scales.toml"
    path.write_text(text)
    sc = one_group(path, n_cells=3, duration_ms=100.0, parameters="i_bias_pa = 30.0",
                   extra='[[drive]]\ntarget = "cells"\nkind = "poisson"\nrate_hz = 300.0\n'
                         'receptor = "excitatory"\nweight_pa = 20.0\n')
    from spikegauge.integrate.adaptive import LocalAdaptiveKernel
    from spikegauge.network.build import build_network

    kernel = LocalAdaptiveKernel(build_network(sc), "dp54", 1e-6, 1e-6)
    used = kernel.scale_used["qif-no-scales"]
    assert used[0] == 10.0   # given in the file
    assert used[1] > 5.0     # measured: the pilot saw the excitatory current (weights of 20 pA), not the placeholder 1
    assert used[2] > 0.0     # never moved: floored, still positive


def test_profile_runs_on_a_model_file_network(tmp_path):
    """profile on an Izhikevich network: the reference is the tight local-adaptive one and checks itself."""
    import json

    import pandas as pd

    model = MODELS_DIR / "izhikevich.toml"
    scen = tmp_path / "izh.toml"
    scen.write_text(f"""
[scenario]
name = "izh-tiny"
duration_ms = 60.0
seed = 2
[[group]]
name = "rs"
size = 6
model = "{model}"
[group.parameters]
i_bias = {{ distribution = "uniform", low = 5.0, high = 12.0 }}
[[pathway]]
source = "rs"
target = "rs"
connect = "sources-per-target"
sources_per_target = 2
receptor = "excitatory"
weight = 3.0
delay_ms = 2.0
[[sweep.grid]]
strategy = "fixed"
stepper = "rk4"
dt_ms = [0.1, 0.05]
crossing = "hermite"
delivery = "exact"
[[sweep.grid]]
strategy = "local-adaptive"
stepper = "dp54"
rtol = 1e-4
""")
    res = CliRunner().invoke(cli, ["profile", str(scen), "--out", str(tmp_path / "p"), "--quiet"])
    assert res.exit_code == 0, res.output
    assert "Verdict:" in res.output
    doc = json.loads((tmp_path / "p" / "profile.json").read_text())
    ref = doc["references"][0]
    assert ref["settings"][0]["strategy"] == "local-adaptive" and ref["uncertainty"]["kind"] == "tight-dp54"
    assert ref["uncertainty"]["adequate"]
    table = pd.read_csv(tmp_path / "p" / "results.csv")
    swept = table[table["origin"] == "sweep"]
    assert (swept["status"] == "ok").all() and swept["spikes"].min() > 0


@pytest.mark.parametrize("settings", [
    dict(strategy="fixed", stepper="rk4", dt_ms=0.05, crossing="hermite", delivery="exact"),
    dict(strategy="fixed", stepper="rk4", dt_ms=0.05, crossing="linear", delivery="grid"),
    dict(strategy="local-adaptive", stepper="dp54", rtol=1e-10),
    dict(strategy="local-adaptive", stepper="bdf", rtol=1e-8),
    dict(strategy="global-adaptive", stepper="dp54", rtol=1e-10),
    dict(strategy="global-adaptive", stepper="bdf", rtol=1e-8),
], ids=lambda s: f"{s['strategy']}-{s['stepper']}-{s.get('delivery', 'dense')}")
def test_an_arrival_that_jumps_the_voltage_past_threshold_fires_the_cell(tmp_path, settings):
    """lif-jump, closed form: from V0 = -60 toward E_L = -49, V(t) = -49 - 11 exp(-t/20); at 46.05 ms
    V = -50.10, and a +0.25 mV arrival carries it past -50: a spike at 46.05 ms exactly (instead of the
    free crossing at 20 ln 11 = 47.96 ms), reset to -60 and a 5 ms hold. A +20 mV arrival during the
    hold (48 ms) is dropped, so the next spike is the free one, 5 + 20 ln 11 ms after the hold begins."""
    small, large = tmp_path / "small.csv", tmp_path / "large.csv"
    small.write_text("cell,time_ms\n0,46.05\n")
    large.write_text("cell,time_ms\n0,48.0\n")
    drives = "".join(f'\n[[drive]]\ntarget = "cells"\nkind = "spikes"\nreceptor = "excitatory"\n'
                     f'weight_mv = {w}\nfile = "{f}"\n' for w, f in ((0.25, small), (20.0, large)))
    sc = one_group(MODELS_DIR / "lif-jump.toml", duration_ms=120.0, initial="v_mv = -60.0", extra=drives)
    got = spike_times(simulate(sc, **settings))
    free = 20.0 * math.log(11.0)
    expected = [46.05, 46.05 + 5.0 + free]
    assert got.size == 2, got
    np.testing.assert_allclose(got[0], expected[0], rtol=0, atol=1e-9)  # the arrival time itself
    # the free crossing: rk4 hermite, dp54 at rtol 1e-10 within 1e-6 ms; bdf at rtol 1e-8 within 1e-4 ms
    # (measured 6e-6); linear interpolation on a 0.05 ms grid within 0.05 ms
    tol = 0.05 if settings.get("delivery") == "grid" else (1e-4 if settings["stepper"] == "bdf" else 1e-6)
    np.testing.assert_allclose(got[1], expected[1], rtol=0, atol=tol)


def test_a_network_whose_model_codes_this_process_does_not_know_is_refused():
    """Codes of model files are per process: a foreign network is one line, not a call through an empty slot."""
    import dataclasses

    from spikegauge.network import build_network

    net = build_network(one_group(MODELS_DIR / "qif.toml", duration_ms=10.0))
    foreign = dataclasses.replace(net, cell_model=np.full_like(net.cell_model, 200))
    with pytest.raises(InputError, match="is not the model this process knows by that code"):
        simulate(foreign, strategy="fixed", stepper="rk2", dt_ms=0.1, crossing="linear", delivery="grid")
    assert simulate(net, strategy="fixed", stepper="rk2", dt_ms=0.1, crossing="linear", delivery="grid").status == "ok"
