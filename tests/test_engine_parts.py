"""Engine building blocks against slow, obvious twins and outside references."""
import numpy as np
import pandas as pd
import pytest

from spikegauge.integrate.crossing import hermite_first_crossing, hermite_value, linear_crossing
from spikegauge.integrate.engine import SpikeBuffer, expand_csr, window_arrivals
from spikegauge.integrate.fixed import grid_time
from spikegauge.runs import Run, load_run


def test_expand_csr_matches_loop():
    rng = np.random.default_rng(3)
    deg = rng.integers(0, 5, size=30)
    ptr = np.concatenate([[0], np.cumsum(deg)]).astype(np.int64)
    sources = rng.integers(0, 30, size=50).astype(np.int64)
    syn, owner = expand_csr(sources, ptr)
    want_syn, want_owner = [], []
    for k, s in enumerate(sources):          # the obvious twin
        for j in range(ptr[s], ptr[s + 1]):
            want_syn.append(j)
            want_owner.append(k)
    assert syn.tolist() == want_syn
    assert owner.tolist() == want_owner


def test_grid_time_never_early_and_snaps():
    dt = 0.1
    t = np.array([0.0, 0.05, 0.1, 0.1 + 1e-12, 0.1 - 1e-12, 0.15, 1.5000000000000002, 2.0999])
    g = grid_time(t, dt)
    np.testing.assert_allclose(g, [0.0, 0.1, 0.1, 0.1, 0.1, 0.2, 1.5, 2.1], rtol=0, atol=1e-12)
    off = np.abs(t - np.round(t / dt) * dt) > 1e-9
    assert np.all(g[off] >= t[off])          # never early unless snapped


def _cubic_first_crossing_numpy(y0, y1, f0, f1, h, level):
    """Independent twin: numpy.polynomial roots of the Hermite cubic minus the level."""
    th = np.linspace(0, 1, 5)
    # Fit the cubic exactly through 4 of its values (numpy.polynomial, an outside library).
    vals = np.array([hermite_value(y0, y1, f0, f1, h, x) for x in th[:4]])
    poly = np.polynomial.Polynomial.fit(th[:4], vals, 3).convert()
    roots = (poly - level).roots()
    real = np.sort(roots[np.abs(roots.imag) < 1e-9].real)
    cands = [r for r in real if 0 < r <= 1 + 1e-12 and (poly.deriv()(r) > 0 or
                                                       poly(min(r + 1e-6, 1)) >= level)]
    return cands[0] if cands else -1.0


def test_hermite_crossing_against_polynomial_roots():
    rng = np.random.default_rng(7)
    checked = 0
    for _ in range(400):
        y0 = rng.uniform(-1, 0)
        y1 = rng.uniform(-1, 1)
        f0, f1 = rng.uniform(-8, 8, size=2)
        th = hermite_first_crossing(y0, y1, f0, f1, 1.0, 0.0)
        want = _cubic_first_crossing_numpy(y0, y1, f0, f1, 1.0, 0.0)
        if want < 0:
            assert th < 0
        else:
            checked += 1
            assert abs(th - want) < 1e-9
            assert abs(hermite_value(y0, y1, f0, f1, 1.0, th)) < 1e-12
    assert checked > 100


def test_hermite_finds_crossing_and_recrossing_inside_step():
    # V(theta) = -0.1 + 2 theta (1 - theta) * 0.3 rises above 0 and falls back: both ends below.
    y0, y1 = -0.1, -0.1
    f0, f1 = 0.6, -0.6       # derivatives of that parabola at the ends (h = 1)
    th = hermite_first_crossing(y0, y1, f0, f1, 1.0, 0.0)
    # closed form: 0.6 th (1 - th) = 0.1  ->  th = (1 - sqrt(1 - 4/6)) / 2
    assert th == pytest.approx((1 - np.sqrt(1 - 4 / 6)) / 2, abs=1e-12)


def test_linear_crossing():
    assert linear_crossing(-1.0, 1.0, 0.0) == 0.5
    assert linear_crossing(-3.0, 1.0, 0.0) == 0.75


def test_window_arrivals_sorted_per_cell():
    rng = np.random.default_rng(1)
    n = 200
    part = dict(time=rng.uniform(0, 1, n).round(2), cell=rng.integers(0, 10, n),
                receptor=rng.integers(0, 2, n), weight=rng.uniform(0, 1, n),
                source=rng.integers(-2, 5, n), syn=rng.integers(0, 100, n))
    part["eff"] = part["time"]
    wa = window_arrivals(10, [part])
    df = pd.DataFrame(part).sort_values(["cell", "time", "source", "syn"], kind="stable")
    np.testing.assert_array_equal(wa.time_ms, df["time"].to_numpy())
    np.testing.assert_array_equal(wa.weight, df["weight"].to_numpy())
    np.testing.assert_array_equal(np.diff(wa.ptr), np.bincount(part["cell"], minlength=10))


def test_spike_buffer_collect_in_cell_order():
    buf = SpikeBuffer.empty(3, 4)
    buf.count[:] = [2, 0, 1]
    buf.time_ms[0, :2] = [0.5, 0.7]
    buf.time_ms[2, 0] = 0.1
    cells, times = buf.collect()
    assert cells.tolist() == [0, 0, 2]
    assert times.tolist() == [0.5, 0.7, 0.1]
    buf.count[1] = 5
    assert buf.overflowed()


def test_run_round_trip(tmp_path):
    spikes = pd.DataFrame({"cell": np.array([0, 2, 1], dtype=np.int64),
                           "time_ms": np.array([0.25, 1.5, 3.125])})
    run = Run(spikes=spikes, n_cells=3, t_start_ms=0.0, t_stop_ms=10.0, group_names=("E", "I"),
              group_first=np.array([0, 2, 3]), settings={"strategy": "fixed", "dt_ms": 0.1},
              cost={"steps": 10, "wall_s": 0.01}, meta={"seed": 4})
    run.save(tmp_path / "r")
    back = load_run(tmp_path / "r")
    pd.testing.assert_frame_equal(back.spikes, spikes)
    assert back.group_names == ("E", "I")
    assert back.settings == run.settings and back.cost == run.cost and back.meta["seed"] == 4
    assert sorted(p.name for p in (tmp_path / "r").iterdir()) == ["run.json", "spikes.npz"]


def test_small_linear_solve_matches_lapack():
    """lu_factor / lu_solve (Newton steps of backward Euler and Rodas3) against
    numpy.linalg.solve (LAPACK)."""
    from spikegauge.integrate.linsolve import lu_factor, lu_solve

    rng = np.random.default_rng(3)
    for n in range(1, 7):
        for _ in range(50):
            A = rng.normal(size=(n, n)) + np.eye(n) * rng.uniform(0, 3)
            b = rng.normal(size=n)
            expected = np.linalg.solve(A, b)
            M, x, piv = A.copy(), b.copy(), np.empty(n, dtype=np.int64)
            assert lu_factor(M, piv, n)
            lu_solve(M, piv, x, n)
            np.testing.assert_allclose(x, expected, rtol=1e-9, atol=1e-12)
    piv = np.empty(2, dtype=np.int64)
    assert not lu_factor(np.array([[1.0, 2.0], [2.0, 4.0]]), piv, 2)
    assert not lu_factor(np.array([[np.nan]]), piv, 1)
