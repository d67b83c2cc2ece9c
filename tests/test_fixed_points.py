"""Tests of hiddenlens._analyses.fixed_points: fixed and slow points and their stability."""

from __future__ import annotations

import copy
import dataclasses
import math

import numpy as np
import pytest
import scipy.optimize
import torch
from torch import nn

import hiddenlens as hl
from hiddenlens._analyses.fixed_points import FixedPoints, find_fixed_points
from hiddenlens._core.trace import Trace
from tests.conftest import interrupted_after

F64 = torch.float64


def _map(fn, S, I=0):
    return hl.wrap(fn, state_size=S, input_size=I, dtype=F64)


def _trace(system, h0, T=20):
    h0 = torch.as_tensor(np.asarray(h0, dtype=np.float64))
    inputs = torch.zeros(h0.shape[0], T, system.input_size, dtype=F64)
    return hl.record(system, inputs, h0)


@pytest.fixture
def agg():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    yield plt
    plt.close("all")


# ---------------------------------------------------------------------- one-unit tanh map
@pytest.mark.parametrize("w", [1.5, 3.0])
def test_tanh_map_fixed_points_match_brentq(w):
    system = _map(lambda s, x: torch.tanh(w * s), 1)
    tr = _trace(system, [[-2.0], [-0.05], [0.02], [1.5]])
    fp = find_fixed_points(system, tr)
    # reference library: scipy.optimize.brentq on h = tanh(w h), bracketed away from 0
    h_star = scipy.optimize.brentq(lambda h: math.tanh(w * h) - h, 1e-3, 1.0)
    order = np.argsort(fp.points[:, 0])
    pts, eig, stab = fp.points[order, 0], fp.eigenvalues[order, 0], fp.stability[order]
    np.testing.assert_allclose(pts, [-h_star, 0.0, h_star], atol=1e-9)
    # analytic: F'(0) = w (expanding), F'(±h*) = w (1 - h*²) (contracting)
    lam = w * (1 - h_star**2)
    np.testing.assert_allclose(eig.real, [lam, w, lam], rtol=1e-8)
    np.testing.assert_allclose(eig.imag, 0.0, atol=1e-12)
    assert list(stab) == ["stable", "unstable", "stable"]
    assert fp.is_fixed.all() and fp.counts == {"stable": 2, "saddle": 0, "unstable": 1,
                                               "marginal": 0}
    assert fp.support.sum() == fp.n_starts - fp.n_discarded
    # the unstable point expands along its single unit
    assert [d.shape for d in np.array(fp.unstable_directions, dtype=object)[order]] == \
        [(0, 1), (1, 1), (0, 1)]


def test_constant_input_moves_the_fixed_points():
    w, u = 2.0, 0.3
    system = _map(lambda s, x: torch.tanh(w * s + x), 1, I=1)
    tr = _trace(system, [[-2.0], [0.0], [2.0]])
    fp = find_fixed_points(system, tr, x=[u])
    # reference library: scipy.optimize.brentq on h = tanh(w h + u); with this input the map
    # keeps one stable point on each side and an unstable one between them, no longer at 0
    roots = [scipy.optimize.brentq(lambda h: math.tanh(w * h + u) - h, a, b)
             for a, b in ((-1.0, -0.6), (-0.6, 0.0), (0.5, 1.0))]
    order = np.argsort(fp.points[:, 0])
    np.testing.assert_allclose(fp.points[order, 0], roots, atol=1e-9)
    assert list(fp.stability[order]) == ["stable", "unstable", "stable"]
    np.testing.assert_allclose(fp.x, [u])


# ---------------------------------------------------------------------- linear maps
def test_linear_map_has_only_the_origin_with_the_eigenvalues_of_w():
    gen = np.random.default_rng(1)
    V = gen.normal(size=(3, 3))
    W = V @ np.diag([1.5, 0.5, -0.3]) @ np.linalg.inv(V)
    Wt = torch.tensor(W)
    system = _map(lambda s, x: s @ Wt.T, 3)
    tr = _trace(system, gen.normal(size=(4, 3)), T=8)
    fp = find_fixed_points(system, tr, n_starts=16)
    # analytic: s = W s has the single solution 0 when 1 is not an eigenvalue of W
    assert len(fp) == 1 and fp.support[0] == 16
    np.testing.assert_allclose(fp.points[0], 0.0, atol=1e-10)
    # reference library: numpy.linalg.eigvals
    ref = np.linalg.eigvals(W)
    ref = ref[np.argsort(-np.abs(ref))]
    np.testing.assert_allclose(fp.eigenvalues[0], ref, atol=1e-10)
    assert fp.stability[0] == "saddle"
    v = V[:, 0] / np.linalg.norm(V[:, 0])
    (d,) = fp.unstable_directions[0]
    assert abs(abs(d @ v) - 1) < 1e-10


def test_eigenvalue_one_is_marginal_line_attractor():
    V = np.array([[1.0, 1.0], [0.5, -1.0]])
    W = V @ np.diag([1.0, 0.5]) @ np.linalg.inv(V)
    Wt = torch.tensor(W)
    system = _map(lambda s, x: s @ Wt.T, 2)
    tr = _trace(system, [[1.0, 0.0], [0.0, 1.0], [-1.0, 2.0]], T=5)
    fp = find_fixed_points(system, tr, n_starts=12)
    # common practice: a line of fixed points (eigenvalue exactly 1) is a line attractor;
    # every point on it is marginal and lies along the eigenvector of eigenvalue 1
    assert len(fp) > 1
    assert set(fp.stability) == {"marginal"}
    assert fp.counts["marginal"] == len(fp)
    v = V[:, 0] / np.linalg.norm(V[:, 0])
    off_line = fp.points - np.outer(fp.points @ v, v)
    np.testing.assert_allclose(off_line, 0.0, atol=1e-9)
    np.testing.assert_allclose(np.abs(fp.eigenvalues), [[1.0, 0.5]] * len(fp), atol=1e-10)
    assert all(d.shape == (0, 2) for d in fp.unstable_directions)


# ---------------------------------------------------------------------- a known saddle
def test_two_unit_tanh_map_has_a_saddle_with_the_right_unstable_direction():
    theta = math.pi / 6
    R = np.array([[math.cos(theta), -math.sin(theta)], [math.sin(theta), math.cos(theta)]])
    W = R @ np.diag([2.0, 0.5]) @ R.T
    Wt = torch.tensor(W)
    system = _map(lambda s, x: torch.tanh(s @ Wt.T), 2)
    gen = np.random.default_rng(0)
    tr = _trace(system, 0.02 * gen.normal(size=(6, 2)), T=25)
    fp = find_fixed_points(system, tr, n_starts=64)
    # analytic: at 0 the Jacobian of tanh(W h) is W, eigenvalues 2 and 0.5, so 0 is a saddle
    # that expands along R e1 = (cos θ, sin θ)
    at0 = np.nonzero(np.linalg.norm(fp.points, axis=1) < 1e-8)[0]
    assert at0.size == 1
    i = at0[0]
    assert fp.stability[i] == "saddle"
    np.testing.assert_allclose(fp.eigenvalues[i], [2.0, 0.5], atol=1e-10)
    np.testing.assert_allclose(fp.unstable_directions[i], [[math.cos(theta), math.sin(theta)]],
                               atol=1e-10)
    # the other points are the two attractors ±p with p = tanh(W p), stable
    others = np.delete(np.arange(len(fp)), i)
    assert set(fp.stability[others]) == {"stable"}
    P = fp.points[others]
    np.testing.assert_allclose(np.tanh(P @ W.T), P, atol=1e-9)
    np.testing.assert_allclose(P[0], -P[1], atol=1e-9)


# ---------------------------------------------------------------------- slow points
def test_slow_point_of_a_map_without_fixed_points():
    a, b = 0.1, 0.01
    system = _map(lambda s, x: s + a * (s * s + b), 1)
    # slow_margin=0: follow every start to the minimum of q (the default stops on the slow
    # stretch around it, see test_speed_rule_*)
    fp = find_fixed_points(system, None, starts=[[-0.4], [0.3], [0.05]], slow_margin=0)
    # analytic: F(h) - h = a (h² + b) > 0 has no root; q = ½ a² (h² + b)² is smallest at h = 0
    # with q = ½ a² b², where F'(0) = 1 (the ghost of a saddle-node pair)
    assert len(fp) == 1 and not fp.is_fixed[0]
    np.testing.assert_allclose(fp.points[0], [0.0], atol=1e-6)
    np.testing.assert_allclose(fp.q[0], 0.5 * a**2 * b**2, rtol=1e-8)
    assert fp.stability[0] == "marginal" and fp.n_slow == 1 and fp.n_fixed == 0


def test_degenerate_fixed_point_converges_slowly_and_is_marginal():
    c = 0.5
    system = _map(lambda s, x: s - c * s**3, 1)
    # analytic: F(h) - h = -c h³ has a triple root at 0 with F'(0) = 1; Newton's method only
    # shrinks h by 2/3 per step there (common practice), so a few steps do not converge
    early = find_fixed_points(system, None, starts=[[0.5]], max_iter=3)
    assert early.n_unconverged == 1 and len(early) == 1
    assert not early.converged[0] and not early.is_fixed[0]
    assert early.q[0] == pytest.approx(0.5 * c**2 * early.points[0, 0] ** 6, rel=1e-12)
    done = find_fixed_points(system, None, starts=[[0.5]], slow_margin=0)
    assert done.n_unconverged == 0 and done.is_fixed[0] and done.converged[0]
    assert abs(done.points[0, 0]) < 1e-3 and done.stability[0] == "marginal"


def test_starts_above_slow_tol_are_discarded():
    a, b = 0.1, 0.01
    system = _map(lambda s, x: s + a * (s * s + b), 1)
    fp = find_fixed_points(system, None, starts=[[0.3], [0.05]], slow_tol=1e-9)
    assert len(fp) == 0 and fp.n_discarded == 2 and fp.final_q.shape == (2,)
    assert fp.summary.startswith("no point found: all 2 starts ended with q above slow_tol")
    assert fp.slow_set_dimension == 0 and "no point found" in repr(fp)
    assert fp.eigenvalues.shape == (0, 1) and fp.to_frame().shape[0] == 0


# ---------------------------------------------------------------------- PyTorch modules
def _module_step(module, x_star):
    """One step of the user's own module (float64 copy): the outside reference for F."""
    m = copy.deepcopy(module).double()

    def f(h):  # (S,) -> (S,)
        out, _ = m(x_star.view(1, 1, -1), h.view(1, 1, -1))
        return out.view(-1)

    return f


@pytest.mark.parametrize("kind", ["gru", "rnn"])
def test_fixed_points_of_torch_modules(kind):
    torch.manual_seed(3)
    if kind == "gru":
        module = nn.GRU(3, 6, batch_first=True)
        scale = 4.0
    else:
        module = nn.RNN(3, 6, batch_first=True)
        scale = 5.0
    with torch.no_grad():
        module.weight_hh_l0.mul_(scale)
    before = copy.deepcopy(module.state_dict())
    gen = np.random.default_rng(0)
    tr = hl.record(module, torch.tensor(gen.normal(size=(8, 30, 3)), dtype=torch.float32))
    x_star = torch.tensor([0.2, -0.1, 0.05], dtype=F64)
    fp = find_fixed_points(module, tr, x=x_star, n_starts=64, noise=0.05)
    assert len(fp) >= 1
    f = _module_step(module, x_star)
    for i in range(len(fp)):
        p = torch.tensor(fp.points[i])
        # reference: the module's own forward pass; F(p) = p up to sqrt(2 q)
        np.testing.assert_allclose(f(p).detach().numpy(), fp.points[i],
                                   atol=10 * math.sqrt(2 * fp.q[i]) + 1e-12)
        # reference library: torch.autograd.functional.jacobian of the module's forward
        J = torch.autograd.functional.jacobian(f, p).numpy()
        ref = np.linalg.eigvals(J)
        np.testing.assert_allclose(np.sort_complex(fp.eigenvalues[i]), np.sort_complex(ref),
                                   atol=1e-8)
        mod = np.abs(ref)
        expected = ("stable" if (mod < 1).all() else "unstable" if (mod > 1).all()
                    else "saddle")
        if not np.any(np.abs(mod - 1) <= fp.marginal_tol):
            assert fp.stability[i] == expected
    for k, v in module.state_dict().items():
        assert torch.equal(v, before[k])


def test_lstm_state_includes_cells():
    torch.manual_seed(0)
    module = nn.LSTM(2, 4, batch_first=True)
    tr = hl.record(module, torch.randn(4, 20, 2))
    fp = find_fixed_points(module, tr, n_starts=16)
    assert fp.points.shape[1] == 8 and len(fp) >= 1
    assert list(fp.to_frame().columns[-8:]) == [f"layer0.{p}[{j}]" for p in "hc"
                                                 for j in range(4)]


# ---------------------------------------------------------------------- contract
@pytest.fixture(scope="module")
def saddle_case():
    W = torch.tensor([[1.8, 0.3], [0.3, 0.6]], dtype=F64)
    system = _map(lambda s, x: torch.tanh(s @ W.T), 2)
    tr = _trace(system, 0.05 * np.random.default_rng(2).normal(size=(5, 2)), T=20)
    return system, tr


def test_result_is_frozen_read_only_and_repeatable(saddle_case):
    system, tr = saddle_case
    states = tr.states.copy()
    rng = torch.get_rng_state()
    fp = find_fixed_points(system, tr, n_starts=32, noise=0.01, seed=5)
    assert torch.equal(torch.get_rng_state(), rng)  # the global RNG is never used
    np.testing.assert_array_equal(tr.states, states)
    with pytest.raises(dataclasses.FrozenInstanceError):
        fp.points = None
    for arr in (fp.points, fp.q, fp.eigenvalues, fp.stability, fp.is_fixed, fp.converged,
                fp.support, fp.final_q, *fp.unstable_directions):
        assert not arr.flags.writeable
    torch.manual_seed(123)  # another global seed must not change anything
    again = find_fixed_points(system, tr, n_starts=32, noise=0.01, seed=5)
    np.testing.assert_array_equal(fp.points, again.points)
    np.testing.assert_array_equal(fp.final_q, again.final_q)
    other = find_fixed_points(system, tr, n_starts=32, noise=0.01, seed=6)
    assert not np.array_equal(fp.final_q, other.final_q)


def test_float32_module_system_is_searched_in_float64():
    torch.manual_seed(1)
    module = nn.RNN(2, 5, batch_first=True)
    tr = hl.record(module, torch.randn(3, 15, 2))
    assert tr.states.dtype == np.float32
    fp = find_fixed_points(module, tr, n_starts=8)
    assert fp.points.dtype == np.float64 and fp.is_fixed.all() and fp.q.max() < 1e-12
    fp32 = find_fixed_points(module, tr, n_starts=8, dtype=torch.float32)
    assert fp32.tol == 1e-9
    np.testing.assert_allclose(fp32.points[0], fp.points[0], atol=1e-5)


def test_to_frame_and_counts(saddle_case):
    system, tr = saddle_case
    fp = find_fixed_points(system, tr, n_starts=32)
    df = fp.to_frame()
    assert list(df.columns[:8]) == ["q", "speed", "kind", "converged", "stability",
                                    "n_unstable", "spectral_radius", "support"]
    assert list(df.columns[8:11]) == ["outside", "in_slow_set", "along_slow_set"]
    assert list(df.columns[11:]) == ["state[0]", "state[1]"]
    assert df.attrs["summary"] == fp.summary and fp.summary
    assert df.shape[0] == len(fp) and sum(fp.counts.values()) == len(fp)
    np.testing.assert_allclose(df["spectral_radius"], np.abs(fp.eigenvalues).max(axis=1))
    assert "FixedPoints(" in repr(fp)


def test_keyboard_interrupt_propagates_and_leaves_nothing_changed():
    system = _map(interrupted_after(3, lambda s, x: torch.tanh(2.0 * s)), 1)
    rng = torch.get_rng_state()
    with pytest.raises(KeyboardInterrupt):
        find_fixed_points(system, None, starts=[[0.5], [-0.3]])
    assert torch.equal(torch.get_rng_state(), rng)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"x": np.zeros(2)}, r"x is the constant input x\* and must have shape \(1,\)"),
        ({"n_starts": 0}, "'n_starts' option of find_fixed_points must be None or an int >= 1"),
        ({"fixed_tol": -1.0}, "'fixed_tol' option of find_fixed_points must be None or a float"),
        ({"noise": "big"}, "'noise' option of find_fixed_points must be a float >= 0"),
        ({"max_iter": 1.5}, "'max_iter' option of find_fixed_points must be None or an int >= 0"),
        ({"starts": np.zeros((3, 2))}, r"starts must have shape \(n_starts, 1\)"),
    ],
)
def test_bad_options_fail_clearly(kwargs, match):
    system = _map(lambda s, x: torch.tanh(s + x), 1, I=1)
    tr = _trace(system, [[0.5]], T=4)
    with pytest.raises(ValueError, match=match):
        find_fixed_points(system, tr, **kwargs)


def test_bad_trace_fails_clearly():
    system = _map(lambda s, x: torch.tanh(2 * s), 2)
    with pytest.raises(TypeError, match="pass starts="):
        find_fixed_points(system, None)
    small = _trace(_map(lambda s, x: torch.tanh(2 * s), 1), [[0.5]], T=3)
    with pytest.raises(ValueError, match="states of size 1 but the"):
        find_fixed_points(system, small)
    nan = Trace(np.full((1, 3, 2), np.nan), np.zeros((1, 2)), np.zeros((1, 3, 0)),
                {"state": slice(0, 2)}, {})
    with pytest.raises(ValueError, match="no finite state"):
        find_fixed_points(system, nan)


# ---------------------------------------------------------------------- plots
def test_plot_on_pca_axes_with_unstable_directions(agg, saddle_case):
    system, tr = saddle_case
    fp = find_fixed_points(system, tr, n_starts=32)
    ax = fp.plot(pca=tr)
    assert ax.get_xlabel().startswith("PC1")
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert any(t.startswith("saddle") for t in labels) and "unstable direction" in labels
    pca = hl.pca_trajectories(tr, k=2)
    fig, axes = agg.subplots(1, 2)
    assert fp.plot(axes[0], pca=pca) is axes[0]
    assert fp.plot(axes[1]) is axes[1]  # S = 2: raw state axes
    assert axes[1].get_xlabel() == "state[0]"
    ax3 = agg.figure().add_subplot(projection="3d")
    assert fp.plot(ax3, dims=3) is ax3


def test_plot_needs_axes_for_wide_states(agg):
    torch.manual_seed(0)
    module = nn.GRU(2, 5, batch_first=True)
    tr = hl.record(module, torch.randn(2, 10, 2))
    fp = find_fixed_points(module, tr, n_starts=4)
    assert fp.plot() is not None  # defaults to the PCA axes of the trace it started from
    from_starts = find_fixed_points(module, None, starts=tr.states[:, -1])
    with pytest.raises(ValueError, match="pca=hiddenlens.pca_trajectories"):
        from_starts.plot()
    other = hl.record(nn.GRU(2, 3, batch_first=True), torch.randn(2, 10, 2))
    with pytest.raises(ValueError, match="fitted on states of size 3"):
        fp.plot(pca=hl.pca_trajectories(other))
    assert fp.plot(pca=tr, show_trajectories=False, direction_length=0.5) is not None


def test_result_type_is_exported():
    assert hl.find_fixed_points is find_fixed_points
    assert FixedPoints.__dataclass_params__.frozen


class _TanhStep(nn.Module):
    """s' = tanh(W s + U x) with trainable parameters (requires_grad stays on)."""

    def __init__(self, dtype):
        super().__init__()
        g = torch.Generator().manual_seed(3)
        self.W = nn.Parameter(0.5 * torch.randn(4, 4, generator=g, dtype=dtype))
        self.U = nn.Parameter(torch.randn(4, 2, generator=g, dtype=dtype))

    def forward(self, s, x):
        return torch.tanh(s @ self.W.T + x @ self.U.T)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_find_fixed_points_on_module_step_function_with_trainable_parameters(dtype):
    step = _TanhStep(dtype)
    system = hl.wrap(step, state_size=4, input_size=2, dtype=dtype)
    x = np.random.default_rng(0).normal(size=(2, 20, 2)).astype(
        np.float32 if dtype == torch.float32 else np.float64)
    fp = find_fixed_points(system, hl.record(system, x), n_starts=6)
    # ||W||_2 < 1 makes the map a contraction at x = 0: one fixed point, the origin, whose
    # Jacobian is W there (tanh'(0) = 1), so its eigenvalues are W's (numpy.linalg.eigvals)
    assert fp.n_fixed == 1 and np.abs(fp.points[0]).max() < 1e-4
    ev = np.sort(np.abs(np.linalg.eigvals(step.W.detach().double().numpy())))
    np.testing.assert_allclose(np.sort(np.abs(fp.eigenvalues[0])), ev, rtol=1e-4)
    assert all(p.requires_grad for p in step.parameters()) and step.W.grad is None


def test_find_fixed_points_accepts_numpy_scalar_tolerances_and_refuses_negative_ones():
    system = _map(lambda s, x: 0.5 * s, 2)
    trace = _trace(system, np.ones((1, 2)))
    fp = find_fixed_points(system, trace, fixed_tol=np.float64(1e-10), slow_tol=np.float32(1e-5),
                           distance_tol=np.float64(1e-3), n_starts=3)
    assert fp.n_fixed == 1
    for bad in ({"fixed_tol": -1e-9}, {"slow_tol": np.float64(-1.0)},
                {"fixed_tol": float("nan")}, {"marginal_tol": np.inf},
                {"slow_margin": -0.1}, {"slow_margin": "0.05"}):
        with pytest.raises(ValueError, match="must be a number >= 0|option of find_fixed_points"):
            find_fixed_points(system, trace, n_starts=3, **bad)
def test_points_report_their_distance_to_the_recorded_states():
    # a linear contraction s -> 0.5 s + x with x = 3: the fixed point 6 lies far outside the
    # recorded states of inputs near 0 (common practice: s* = x / (1 - a))
    step = hl.wrap(lambda s, x: 0.5 * s + x, state_size=1, input_size=1,
                           dtype=torch.float64)
    x = 0.1 * np.random.default_rng(0).standard_normal((2, 20, 1))
    tr = hl.record(step, x)
    fp = hl.find_fixed_points(step, tr, np.array([3.0]), n_starts=8)
    assert len(fp) == 1 and fp.outside.tolist() == [True]
    np.testing.assert_allclose(fp.points[0, 0], 6.0, atol=1e-6)
    np.testing.assert_allclose(fp.distance_to_states[0], 6.0 - tr.states.max(), atol=1e-6)


# ---------------------------------------------------------------------- continuous attractors
def _linear_with_unit_eigenvalues(S, n_one, seed=0):
    """W = V diag(1, .., 1, 0.5, ..) V⁻¹ with n_one eigenvalues 1: a flat of fixed points."""
    gen = np.random.default_rng(seed)
    V = gen.normal(size=(S, S)) + 2 * np.eye(S)
    lam = np.r_[np.ones(n_one), np.full(S - n_one, 0.5)]
    return V @ np.diag(lam) @ np.linalg.inv(V), V


@pytest.mark.parametrize("n_one", [1, 2])
def test_linear_map_with_unit_eigenvalues_gives_a_slow_set_of_that_dimension(n_one):
    S = 6
    W, V = _linear_with_unit_eigenvalues(S, n_one)
    Wt = torch.tensor(W)
    system = _map(lambda s, x: s @ Wt.T, S)
    h0 = np.random.default_rng(1).normal(size=(40, S))
    fp = find_fixed_points(system, _trace(system, h0, T=10))
    # common practice (Sussillo & Barak 2013 for slow points): the fixed points of s -> W s
    # with n_one eigenvalues 1 fill the span of their eigenvectors; every one is marginal
    assert len(fp) > 20 and set(fp.stability) == {"marginal"}
    Q, _ = np.linalg.qr(V[:, :n_one])
    np.testing.assert_allclose(fp.points - fp.points @ Q @ Q.T, 0.0, atol=1e-8)
    assert fp.slow_set_dimension == n_one
    assert fp.tangent_eigenvalue == pytest.approx(1.0, abs=1e-9)
    shape = {1: "line attractor", 2: "plane attractor"}[n_one]
    assert fp.summary.startswith(f"{shape}: {len(fp)} fixed points along")
    assert fp.metadata["slow_set_dimension"] == n_one and fp.metadata["summary"] == fp.summary
    if n_one == 1:  # ordered along the line: the coordinates increase along the order
        c = fp.slow_set_coordinate[fp.slow_set_order]
        assert np.all(np.diff(c) > 0) and fp.slow_set_order.size == len(fp)


def _tanh_line(S=8, seed=0):
    """tanh(W s), W = v vᵀ + 0.5 P⊥ M P⊥ with v = 1/√S: the line s = a v maps to
    tanh(a/√S)·√S·v, slower than a only by ~a³/(3S): an approximate line attractor."""
    gen = np.random.default_rng(seed)
    v = np.ones(S) / np.sqrt(S)
    P = np.eye(S) - np.outer(v, v)
    M = np.linalg.qr(gen.normal(size=(S, S)))[0]
    W = np.outer(v, v) + 0.5 * P @ M @ P
    return torch.tensor(W), v


def test_speed_rule_keeps_an_approximate_line_attractor_spread():
    Wt, v = _tanh_line()
    system = _map(lambda s, x: torch.tanh(s @ Wt.T), v.size)
    gen = np.random.default_rng(2)
    h0 = np.outer(gen.uniform(-2, 2, 60), v) + 0.3 * gen.normal(size=(60, v.size))
    tr = _trace(system, h0, T=15)
    fp = find_fixed_points(system, tr)
    # common practice: on s -> tanh(W s) with a unit eigenvalue along v the line a·v is
    # only slowly drifting (speed ~ |a|³ / (3 S)); its slow points lie along v and the whole
    # search must not end at the one true fixed point 0 (Sussillo & Barak 2013)
    assert len(fp) >= 20 and fp.slow_set_dimension == 1
    along = fp.points @ v
    # the slow stretch ends where the speed a − √S tanh(a/√S) reaches sqrt(2 slow_tol)
    # (scipy brentq on the analytic speed along the line)
    rt = np.sqrt(v.size)
    edge = scipy.optimize.brentq(lambda a: a - rt * np.tanh(a / rt) - np.sqrt(2e-5), 0.01, 5)
    assert 0.8 * edge < along.max() <= edge + 1e-6 and -edge - 1e-6 <= along.min() < -0.8 * edge
    off = fp.points - np.outer(along, v)
    assert np.abs(off).max() < 0.05
    assert fp.tangent_eigenvalue == pytest.approx(1.0, abs=0.05)
    assert fp.summary.startswith(f"approximate line attractor: {int(fp.in_slow_set.sum())} "
                                 "slow points along one direction, |λ| 0.9")
    assert fp.settled.sum() > 10 and set(fp.stability[fp.in_slow_set]) <= {"marginal",
                                                                            "stable"}
    # turning the speed rule off slides every start to (near) the origin
    collapsed = find_fixed_points(system, tr, slow_margin=0)
    assert np.ptp(collapsed.points @ v) < 0.5 * np.ptp(along)


# ---------------------------------------------------------------------- reach and key figures
def test_points_outside_the_recorded_states_are_flagged_and_not_counted():
    from hiddenlens._analyses.builtin import _figures_fixed_points, _fixed_point_words

    # s -> 0.5 s + x, x = 3: the only fixed point s* = x / (1 − 0.5) = 6 (common practice)
    # lies far beyond states recorded under inputs near 0
    step = hl.wrap(lambda s, x: 0.5 * s + x, state_size=1, input_size=1, dtype=F64)
    tr = hl.record(step, 0.1 * np.random.default_rng(0).standard_normal((2, 20, 1)))
    fp = hl.find_fixed_points(step, tr, np.array([3.0]), n_starts=8)
    assert len(fp) == 1 and fp.outside[0] and fp.stability[0] == "stable"
    f = _figures_fixed_points(fp)
    assert f["fixed_points_stable"] == 0 and f["fixed_points_outside"] == 1
    assert f["slow_set_dimension"] == 0
    assert _fixed_point_words(f) == [
        "no fixed point inside the recorded states (1 outside, not counted)"]
    assert "1 outside the recorded states (not counted)" in fp.summary
    assert fp.to_frame()["outside"].tolist() == [True]
    inside = hl.find_fixed_points(step, tr, n_starts=8)  # x = 0: s* = 0, within the states
    assert _figures_fixed_points(inside)["fixed_points_stable"] == 1


# ---------------------------------------------------------------------- mean constant input
def test_constant_input_may_be_the_mean_input_over_a_window():
    # s -> 0.5 s + x1 − x2 has the one fixed point s* = 2 (x1 − x2) (common practice:
    # x / (1 − 0.5)); the
    # mean input is checked against numpy's mean of the recorded inputs
    step = hl.wrap(lambda s, x: 0.5 * s + x[:, :1] - x[:, 1:], state_size=1, input_size=2,
                   dtype=F64)
    x = np.zeros((3, 30, 2))
    x[:, :10, 0] = 1.0
    x[:, 10:, 1] = np.random.default_rng(0).uniform(0, 0.2, (3, 20))
    tr = hl.record(step, x)
    whole = hl.find_fixed_points(step, tr, "mean", n_starts=8)
    m = x.reshape(-1, 2).mean(axis=0)
    np.testing.assert_allclose(whole.x, m, atol=1e-15)
    np.testing.assert_allclose(whole.points[:, 0], [2 * (m[0] - m[1])], atol=1e-8)
    cue = hl.find_fixed_points(step, tr, ("mean", 0, 10), n_starts=8)
    np.testing.assert_allclose(cue.x, [1.0, 0.0])
    np.testing.assert_allclose(cue.points[:, 0], [2.0], atol=1e-8)
    for bad, err in (("median", ValueError), (("mean", 5, 5), ValueError),
                     (("mean", 0, 31), ValueError), (("mean", 0.0, 10), ValueError),
                     (("mean", 0), ValueError)):
        with pytest.raises(err, match="mean"):
            hl.find_fixed_points(step, tr, bad, n_starts=8)
    with pytest.raises(TypeError, match="averages the inputs of a trace"):
        hl.find_fixed_points(step, None, "mean", starts=[[0.0]])


# ---------------------------------------------------------------------- an integrator net
def test_line_attractor_of_a_pulse_integrating_rnn_is_found_with_default_settings():
    # a tanh nn.RNN built to integrate ±pulses: W_hh = v vᵀ + 0.5 P⊥ M P⊥, W_ih = 0.3 v, so
    # the state adds each pulse along v and keeps it (an approximate line attractor, Mante
    # et al. 2013; slow points after Sussillo & Barak 2013)
    S = 10
    Wt, v = _tanh_line(S, seed=3)
    rnn = nn.RNN(1, S, batch_first=True)
    with torch.no_grad():
        rnn.weight_hh_l0.copy_(Wt.float())
        rnn.weight_ih_l0.copy_(0.3 * torch.tensor(v, dtype=torch.float32)[:, None])
        rnn.bias_hh_l0.zero_()
        rnn.bias_ih_l0.zero_()
    gen = torch.Generator().manual_seed(0)
    B, T = 48, 60
    pulses = (torch.rand(B, T, 1, generator=gen) < 0.15).float() * torch.where(
        torch.rand(B, T, 1, generator=gen) < 0.5, -1.0, 1.0)
    tr = hl.record(rnn, pulses)
    # the integrator works: the state along v follows the running pulse sum (numpy corrcoef)
    run = pulses.cumsum(1)[..., 0].numpy().ravel()
    assert np.corrcoef((tr.states @ v).ravel(), run)[0, 1] > 0.95
    fp = hl.find_fixed_points(rnn, tr)
    assert fp.slow_set_dimension == 1 and fp.in_slow_set.sum() >= 20
    along = fp.points @ v
    assert np.ptp(along[fp.in_slow_set]) > 0.5
    assert np.abs(fp.points - np.outer(along, v)).max() < 0.05
    assert fp.summary.startswith("approximate line attractor:")
    assert "|λ| 0.9" in fp.summary or "|λ| 1.0" in fp.summary
