"""Lyapunov spectra: published values for classic maps and flows, random-network theory, exact
identities of the QR method, agreement of the two ways of advancing the frame, and bad options."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import torch
from scipy import integrate, optimize
from torch import nn

import hiddenlens as hl
from hiddenlens._analyses.lyapunov import (
    LyapunovSpectrum,
    _with_dtype,
    kaplan_yorke_dimension,
    lyapunov_spectrum,
)
from hiddenlens._core.record import as_system
from hiddenlens._core.systems import RecurrentSystem
from hiddenlens._core.validation import as_dtype
from hiddenlens._faces.summary import key_figures, summary_sentence
from tests.conftest import interrupted_after

F64 = torch.float64


def lyap(system, x, *, h0=None, dtype=None, **kw):
    """Record ``x`` in the analysis' precision, then run lyapunov_spectrum on the trace."""
    wrap_options = {n: kw.pop(n) for n in ("direction", "submodule") if n in kw}
    if dtype is not None and not isinstance(system, RecurrentSystem):
        wrap_options["dtype"] = dtype
    system = as_system(system, **wrap_options)
    if dtype is not None:
        system = _with_dtype(system, as_dtype(dtype))
    return lyapunov_spectrum(system, hl.record(system, x, h0), **kw)


def autonomous(B: int, T: int) -> torch.Tensor:
    return torch.zeros(B, T, 0, dtype=F64)


# ---------------------------------------------------------------------------- maps
def henon_step(s, x, a=1.4, b=0.3):
    return torch.stack([1 - a * s[:, 0] ** 2 + s[:, 1], b * s[:, 0]], dim=-1)


@pytest.fixture(scope="module")
def henon():
    system = hl.wrap(henon_step, state_size=2, input_size=0, dtype=F64)
    h0 = 0.1 + 0.01 * torch.arange(8, dtype=F64)[:, None].repeat(1, 2)
    return system, lyap(system, autonomous(8, 20_000), h0=h0, warmup=500)


def test_henon_map_published_exponents(henon):
    _, res = henon
    # Sprott, Chaos and Time-Series Analysis (2003), Henon map a=1.4, b=0.3: 0.41922, -1.62319
    np.testing.assert_allclose(res.exponents, [0.41922, -1.62319], atol=4e-3)
    # the Jacobian [[-2ax, 1], [b, 0]] has determinant -b everywhere, so the exponents sum to
    # ln b exactly (common practice); the QR method keeps this to rounding in float64
    assert abs(res.exponents.sum() - math.log(0.3)) < 1e-10
    np.testing.assert_allclose(res.per_sample.sum(axis=1), math.log(0.3), atol=1e-10)
    # Sprott (2003): Kaplan-Yorke dimension of the Henon attractor 1.2583
    assert abs(res.kaplan_yorke - 1.2583) < 5e-3


def test_henon_methods_and_qr_cadence_agree(henon):
    system, res = henon
    h0 = 0.1 + 0.01 * torch.arange(8, dtype=F64)[:, None].repeat(1, 2)
    x = autonomous(8, 1000)
    a = lyap(system, x, h0=h0, method="jacobian")
    b = lyap(system, x, h0=h0, method="jvp")
    # reference: the two routes compute the same products J_t Q (torch autograd both ways)
    np.testing.assert_allclose(b.per_sample, a.per_sample, rtol=0, atol=1e-12)
    # QR of a product of Jacobians has R = product of the per-step R factors, so fewer
    # re-orthonormalisations give the same sums of logs (common practice)
    c = lyap(system, x, h0=h0, qr_every=3)
    np.testing.assert_allclose(c.per_sample, a.per_sample, rtol=0, atol=1e-9)


SIG, RHO, BETA, DT = 10.0, 28.0, 8.0 / 3.0, 0.01
_LIN = torch.tensor([[-SIG, SIG, 0.0], [RHO, -1.0, 0.0], [0.0, 0.0, -BETA]], dtype=F64).T
_QUAD = torch.tensor([[0.0, -1.0, 0.0], [0.0, 0.0, 1.0]], dtype=F64)  # rows: x*z, x*y


def lorenz_field(u):
    return torch.addmm(u @ _LIN, u[:, :1] * u[:, [2, 1]], _QUAD)


def lorenz_rk4(s, x):
    k1 = lorenz_field(s)
    k2 = lorenz_field(s + 0.5 * DT * k1)
    k3 = lorenz_field(s + 0.5 * DT * k2)
    k4 = lorenz_field(s + DT * k3)
    return s + (DT / 6.0) * (k1 + 2 * (k2 + k3) + k4)


def test_lorenz_flow_published_exponents():
    system = hl.wrap(lorenz_rk4, state_size=3, input_size=0, dtype=F64)
    h0 = torch.tensor([[1.0, 1.0, 20.0]], dtype=F64) + torch.arange(4, dtype=F64)[:, None]
    res = lyap(system, autonomous(4, 20_000), h0=h0, warmup=1000)
    assert res.method == "jacobian"  # one batched vmap(jacrev) per chunk of steps
    per_time = res.exponents / DT
    # Sprott, Chaos and Time-Series Analysis (2003), Lorenz sigma=10, rho=28, beta=8/3:
    # 0.9056, 0, -14.5723 per unit time
    np.testing.assert_allclose(per_time, [0.9056, 0.0, -14.5723], atol=0.03)
    # the divergence of the Lorenz field is -(sigma + 1 + beta) everywhere (Lorenz 1963);
    # one RK4 step preserves the volume contraction to O(dt^4)
    assert abs(per_time.sum() + SIG + 1 + BETA) < 1e-3
    # Sprott (2003): Kaplan-Yorke dimension 2.0621
    assert abs(res.kaplan_yorke - 2.0621) < 5e-3


def test_logistic_map_ln2():
    system = hl.wrap(lambda s, x: 4.0 * s * (1 - s), state_size=1, input_size=0, dtype=F64)
    h0 = torch.linspace(0.1, 0.4, 4, dtype=F64)[:, None]
    res = lyap(system, autonomous(4, 10_000), h0=h0)
    # Sprott (2003), logistic map at r=4: ln 2 = 0.6931 (exact via the tent-map conjugacy)
    assert abs(res.exponents[0] - math.log(2)) < 1e-3


def test_linear_map_log_moduli_of_eigenvalues():
    rng = np.random.default_rng(3)
    W = rng.normal(0, 1 / np.sqrt(6), (6, 6))
    Wt = torch.tensor(W)
    system = hl.wrap(lambda s, x: s @ Wt.T, state_size=6, input_size=0, dtype=F64)
    # h0 = 0 is a fixed point (and says so); J_t = W at every step, wherever the state is
    with pytest.warns(hl.StationaryTrajectoryWarning):
        res = lyap(system, autonomous(1, 3000))
    # reference: numpy.linalg.eigvals; exponents of h' = W h are log |eigenvalues| (common
    # practice); complex pairs share a modulus, and a finite run splits them by O(1/T)
    ref = np.sort(np.log(np.abs(np.linalg.eigvals(W))))[::-1]
    np.testing.assert_allclose(res.exponents, ref, atol=1e-3)
    assert abs(res.exponents.sum() - ref.sum()) < 1e-10  # log |det W| exactly
    # k < S: the first k columns of the frame and of R do not depend on the rest (Gram-Schmidt)
    with pytest.warns(hl.StationaryTrajectoryWarning):
        top = lyap(system, autonomous(1, 3000), k=3)
    np.testing.assert_allclose(top.exponents, res.exponents[:3], rtol=0, atol=1e-12)


# ---------------------------------------------------------------------------- random networks
def _gauss_mean(f, q):
    return integrate.quad(lambda z: f(z) * np.exp(-z * z / (2 * q)) / np.sqrt(2 * np.pi * q),
                          -np.inf, np.inf)[0]


def mean_field_exponent(g: float) -> float:
    """½ ln(g² E[sech⁴ z]), z ~ N(0, q*), q* = g² E[tanh² z] (Molgedey, Schuchhardt & Schuster
    1992, discrete-time random tanh networks)."""
    q = optimize.brentq(lambda q: q - g * g * _gauss_mean(lambda z: np.tanh(z) ** 2, q),
                        1e-3, 10 * g * g)
    # sech z = 2 e^-|z| / (1 + e^-2|z|), written so that it cannot overflow
    sech4 = _gauss_mean(lambda z: (2 * np.exp(-abs(z)) / (1 + np.exp(-2 * abs(z)))) ** 4, q)
    return 0.5 * math.log(g * g * sech4)


def random_tanh_network(g: float, N: int = 200, seed: int = 1):
    """h' = tanh(W h), W_ij ~ N(0, g²/N), as an nn.RNN without bias and with zero input weights."""
    W = np.random.default_rng(seed).normal(0, g / math.sqrt(N), (N, N))
    with torch.random.fork_rng(devices=[]):
        rnn = nn.RNN(1, N, bias=False, batch_first=True)
    with torch.no_grad():
        rnn.weight_ih_l0.zero_()
        rnn.weight_hh_l0.copy_(torch.from_numpy(W))
    h0 = torch.from_numpy(np.random.default_rng(seed + 1).normal(0, 1, (2, N)))
    return rnn, W, h0


@pytest.mark.parametrize("g", [0.5, 0.9])
def test_random_tanh_network_subcritical_decays(g):
    rnn, W, h0 = random_tanh_network(g)
    with pytest.warns(hl.StationaryTrajectoryWarning, match="settled on a fixed point"):
        res = lyap(rnn, torch.zeros(2, 1500, 1), k=1, h0=h0, warmup=700, dtype=F64)
    # the state decays to the fixed point 0, where J = W: the largest exponent is ln rho(W)
    # (common practice; reference numpy.linalg.eigvals), negative for g < 1 (circular law)
    ln_rho = math.log(np.abs(np.linalg.eigvals(W)).max())
    assert ln_rho < 0
    assert abs(res.exponents[0] - ln_rho) < 2e-3


@pytest.mark.parametrize("g", [2.0, 3.0])
def test_random_tanh_network_chaotic_near_mean_field(g):
    rnn, W, h0 = random_tanh_network(g)
    res = lyap(rnn, torch.zeros(2, 1500, 1), k=1, h0=h0, warmup=300, dtype=F64)
    # chaos for g > 1 (Sompolinsky, Crisanti & Sommers 1988); the largest exponent is near the
    # discrete-time mean-field value (Molgedey, Schuchhardt & Schuster 1992); N=200 is finite,
    # so allow a few hundredths
    lam = res.exponents[0]
    assert lam > 0
    assert abs(lam - mean_field_exponent(g)) < 0.04


# ---------------------------------------------------------------------------- recurrent modules
@pytest.mark.parametrize("cls", [nn.GRU, nn.LSTM])
def test_jacobian_and_jvp_routes_agree_on_modules(make, gen, cls):
    m = make(cls, 3, 6, 2, batch_first=True, gen=gen, scale=0.8)
    x = torch.randn(3, 200, 3, generator=gen)
    a = lyap(m, x, dtype=F64, method="jacobian")
    b = lyap(m, x, dtype=F64, method="jvp")
    # reference: torch autograd (jvp route) against the explicit step Jacobians; the two agree
    # to rounding, which steps with a nearly singular J amplify in the smallest exponents
    np.testing.assert_allclose(b.per_sample, a.per_sample, rtol=1e-5, atol=1e-8)
    assert a.per_sample.shape == (3, 24 if cls is nn.LSTM else 12)


def test_float32_roughly_matches_float64(make, gen):
    m = make(nn.GRU, 3, 16, batch_first=True, gen=gen, scale=0.6)
    x = torch.randn(2, 400, 3, generator=gen)
    r64 = lyap(m, x, dtype="float64")
    r32 = lyap(m, x)
    assert r32.dtype == "float32" and r64.dtype == "float64"
    np.testing.assert_allclose(r32.exponents, r64.exponents, rtol=0, atol=2e-3)


def test_k_below_state_size_is_the_top_of_the_spectrum(make, gen):
    m = make(nn.GRU, 3, 12, batch_first=True, gen=gen, scale=0.7)
    x = torch.randn(2, 300, 3, generator=gen)
    full = lyap(m, x, dtype=F64)
    top = lyap(m, x, k=4, dtype=F64)
    np.testing.assert_allclose(top.per_sample, full.per_sample[:, :4], rtol=0, atol=1e-10)
    assert np.all(np.diff(full.exponents) <= 1e-9)  # descending


def test_time_reversed_direction_runs_backwards(make, gen):
    bi = make(nn.GRU, 3, 5, batch_first=True, bidirectional=True, gen=gen)
    fw = make(nn.GRU, 3, 5, batch_first=True, gen=gen)
    with torch.no_grad():
        for name in ("weight_ih", "weight_hh", "bias_ih", "bias_hh"):
            getattr(fw, f"{name}_l0").copy_(getattr(bi, f"{name}_l0_reverse"))
    x = torch.randn(2, 120, 3, generator=gen)
    back = lyap(bi, x, direction="backward", dtype=F64)
    ref = lyap(fw, x.flip(1), dtype=F64)
    np.testing.assert_allclose(back.per_sample, ref.per_sample, rtol=0, atol=1e-12)


# ---------------------------------------------------------------------------- result contract
def test_result_is_frozen_repeatable_and_leaves_the_model_alone(make, gen, snapshot):
    m = make(nn.LSTM, 3, 4, batch_first=True, gen=gen)
    m.train()
    snap = snapshot(m)
    np_state = np.random.get_state()[1].copy()  # noqa: NPY002 (checks the global RNG)
    threads = torch.get_num_threads()
    x = torch.randn(3, 80, 3, generator=gen)
    res = lyap(m, x, warmup=10, dtype="float64")
    snap.assert_unchanged()
    assert np.array_equal(np.random.get_state()[1], np_state)  # noqa: NPY002
    assert torch.get_num_threads() == threads
    assert isinstance(res, LyapunovSpectrum)
    with pytest.raises(dataclasses.FrozenInstanceError):
        res.exponents = None
    for arr in (res.exponents, res.per_sample, res.std, res.running, res.running_steps):
        assert not arr.flags.writeable
    assert res.exponents.shape == (8,) and res.per_sample.shape == (3, 8)
    assert res.n_steps == 70 and res.warmup == 10 and res.running_steps[-1] == 70
    np.testing.assert_allclose(res.running[-1], res.exponents, rtol=1e-12)
    np.testing.assert_allclose(res.std, res.per_sample.std(axis=0, ddof=1))
    again = lyap(m, x, warmup=10, dtype="float64")
    np.testing.assert_array_equal(again.per_sample, res.per_sample)
    other = lyap(m, x, warmup=10, dtype="float64", seed=5)
    np.testing.assert_allclose(other.exponents, res.exponents, atol=0.1)
    assert "LyapunovSpectrum(" in repr(res)


def test_to_frame_and_plot(henon):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    _, res = henon
    df = res.to_frame()
    assert list(df.columns) == ["index", "exponent", "std", "min", "max"]
    np.testing.assert_allclose(df["exponent"], res.exponents)
    assert res.to_frame("per_sample").shape == (16, 3)
    run = res.to_frame("running")
    assert list(run.columns) == ["steps", "exponent_1", "exponent_2"]
    assert len(run) <= 1001
    fig, ax = plt.subplots()
    assert res.plot(ax=ax) is ax
    assert len(ax.lines) >= 2
    assert res.plot(ax=ax, kind="spectrum") is ax
    plt.close(fig)
    with pytest.raises(ValueError, match="kind must be"):
        res.plot(kind="bars")
    with pytest.raises(ValueError, match="table must be"):
        res.to_frame("everything")


def test_kaplan_yorke_dimension_edge_cases():
    # Kaplan & Yorke (1979): D = j + (λ_1 + ... + λ_j) / |λ_{j+1}|
    assert kaplan_yorke_dimension([-0.1, -0.5]) == 0.0
    assert kaplan_yorke_dimension([0.5, -1.0]) == pytest.approx(1.5)
    assert kaplan_yorke_dimension([0.5, 0.1], state_size=2) == 2.0
    assert math.isnan(kaplan_yorke_dimension([0.5, 0.1], state_size=3))
    assert kaplan_yorke_dimension([0.2, -np.inf]) == 1.0


def test_interrupt_restores_threads_and_propagates():
    step = interrupted_after(50, lambda s, x: 0.5 * s)
    system = hl.wrap(step, state_size=2, input_size=0, dtype=F64)
    threads = torch.get_num_threads()
    with pytest.raises(KeyboardInterrupt):
        lyap(system, autonomous(1, 200), method="jvp")
    assert torch.get_num_threads() == threads


# ---------------------------------------------------------------------------- bad input
def test_bad_options_fail_clearly(make, gen):
    m = make(nn.GRU, 3, 4, batch_first=True, gen=gen)
    x = torch.randn(2, 30, 3, generator=gen)
    with pytest.raises(ValueError, match="k must be an integer between 1 and the state size 4"):
        lyap(m, x, k=5)
    with pytest.raises(ValueError, match=r"The 'k' option of lyapunov_spectrum must be None or "
                                         r"an int >= 1; got 0\."):
        lyap(m, x, k=0)
    with pytest.raises(ValueError, match="warmup must be an integer with 0 <= warmup < T = 30"):
        lyap(m, x, warmup=30)
    with pytest.raises(ValueError, match="The 'method' option of lyapunov_spectrum must be one of"):
        lyap(m, x, method="svd")
    with pytest.raises(ValueError, match="'qr_every' option of lyapunov_spectrum must be an int"):
        lyap(m, x, qr_every=0)
    with pytest.raises(ValueError, match="The 'seed' option of lyapunov_spectrum must be an int"):
        lyap(m, x, seed=-1)
    with pytest.raises(ValueError, match="dtype must be float32 or float64"):
        lyap(m, x, dtype="float16")
    with pytest.raises(ValueError, match="inputs has 5 features but"):
        lyap(m, torch.zeros(2, 30, 5))
    with pytest.raises(TypeError, match="already a RecurrentSystem"):
        lyap(hl.wrap(m), x, direction="forward")


def test_exploding_trajectory_is_refused():
    system = hl.wrap(lambda s, x: 3.0 * s + 1.0, state_size=2, input_size=0)
    with pytest.raises(ValueError, match="became NaN/Inf at step t=8[0-9]"), \
            pytest.warns(DeprecationWarning):
        lyapunov_spectrum(system, torch.zeros(1, 200, 0))  # the inputs form runs the map itself


def test_step_function_in_the_wrong_precision_is_refused():
    W = torch.eye(2)  # float32 constant inside a float64 system

    system = hl.wrap(lambda s, x: torch.tanh(s.float() @ W), state_size=2, input_size=0,
                     dtype=F64)
    with pytest.raises(TypeError, match="returned torch.float32 states for float64 inputs"):
        lyap(system, autonomous(1, 20))


def _lorenz(s, dt=0.01):
    # Lorenz (1963) with sigma=10, rho=28, beta=8/3, one explicit Euler step of length dt
    x, y, z = s[..., 0], s[..., 1], s[..., 2]
    return s + dt * torch.stack([10.0 * (y - x), x * (28.0 - z) - y, x * y - 8.0 / 3.0 * z], -1)


def test_lyapunov_warns_when_the_trajectory_never_leaves_h0():
    # the origin is a fixed point of Lorenz: from the default h0 of zeros nothing moves
    with pytest.warns(hl.StationaryTrajectoryWarning, match="never left its initial state"):
        res = hl.lyapunov_spectrum(_lorenz, 300, state_size=3, dtype="float64")
    assert "never left" in res.metadata["caution"]
    # the origin's exponents are those of its Jacobian I + dt A (numpy.linalg.eigvals)
    A = np.array([[-10.0, 10.0, 0.0], [28.0, -1.0, 0.0], [0.0, 0.0, -8.0 / 3.0]])
    ref = np.sort(np.log(np.abs(np.linalg.eigvals(np.eye(3) + 0.01 * A))))[::-1]
    np.testing.assert_allclose(np.sort(res.exponents)[::-1], ref, atol=1e-3)


def test_lyapunov_warns_when_the_trajectory_settles_on_a_fixed_point():
    def contract(s):
        return 0.1 * s

    with pytest.warns(hl.StationaryTrajectoryWarning, match="settled on a fixed point"):
        hl.lyapunov_spectrum(contract, 400, state_size=2, dtype="float64",
                             h0=np.ones((1, 2)))


def test_lyapunov_autonomous_map_takes_steps_and_a_state_only_function():
    h0 = np.array([[1.0, 1.0, 1.0]])
    a = hl.lyapunov_spectrum(_lorenz, None, steps=3000, state_size=3, dtype="float64", h0=h0)
    b = hl.lyapunov_spectrum(_lorenz, 3000, state_size=3, dtype="float64", h0=h0)
    with pytest.warns(DeprecationWarning):  # zero-width inputs: the 0.1 inputs form
        c = hl.lyapunov_spectrum(_lorenz, np.zeros((1, 3000, 0)), state_size=3, input_size=0,
                                 dtype="float64", h0=h0)
    np.testing.assert_array_equal(a.exponents, b.exponents)
    np.testing.assert_array_equal(a.exponents, c.exponents)
    # one positive, one near zero, one strongly negative exponent (Lorenz 1963; the flow's
    # values ~0.9, 0, -14.6 per unit time are quoted from memory, Sprott 2003)
    lam = a.exponents / 0.01
    assert lam[0] > 0.3 and abs(lam[1]) < 0.3 and lam[2] < -10
    with pytest.raises(ValueError, match="drives only an autonomous map"):
        hl.lyapunov_spectrum(hl.wrap(lambda s, x: s + x, state_size=2, input_size=2), 50)
    with pytest.raises(ValueError, match="either inputs or steps="):
        hl.lyapunov_spectrum(_lorenz, 10, steps=10, state_size=3)
    with pytest.raises(ValueError, match="steps must be a positive integer"):
        hl.lyapunov_spectrum(_lorenz, None, steps=0, state_size=3)


def test_lyapunov_flags_exponents_from_few_counted_steps():
    h0 = np.array([[1.0, 1.0, 1.0]])
    res = hl.lyapunov_spectrum(_lorenz, 23, state_size=3, dtype="float64", h0=h0, warmup=0)
    assert res.metadata["counted_steps"] == 23
    assert "only 23 counted steps" in res.metadata["caution"]
    one = hl.lyapunov_spectrum(_lorenz, 2, state_size=3, dtype="float64", h0=h0, warmup=1)
    assert "only 1 counted step " in one.metadata["caution"]
    figs = key_figures({"lyapunov": res})
    assert "from only 23 counted steps, not conclusive" in summary_sentence(figs)


def test_lyapunov_keeps_the_trajectory_it_ran():
    h0 = np.array([[1.0, 1.0, 1.0]])
    res = hl.lyapunov_spectrum(_lorenz, 200, state_size=3, dtype="float64", h0=h0,
                               keep_trace=True)
    tr = res.metadata["trace"]
    again = hl.record(hl.wrap(lambda s, x: _lorenz(s), state_size=3, input_size=0,
                              dtype=torch.float64), np.zeros((1, 200, 0)), h0)
    np.testing.assert_array_equal(tr.states, again.states)


@pytest.mark.parametrize("name, step, message", [
    ("heaviside", lambda s: 0.3 * s + 0.5 * torch.heaviside(s, torch.tensor(0.5, dtype=s.dtype)),
     "operation with no derivative"),
    ("floordiv", lambda s: 0.5 * s + (s * 10) // 3 * 0.01, "operation with no derivative"),
    ("if", lambda s: s * 0.5 if s.sum() > 0 else s * 0.4, "torch.where"),
    ("item", lambda s: s * (0.5 + 0.0 * s.sum().item()), "torch.where"),
    ("numpy", lambda s: torch.from_numpy(np.tanh(s.numpy())), "converts tensors to numpy"),
    ("random", lambda s: 0.5 * s + 0.01 * torch.randn_like(s), "draws random numbers.*as an input"),
])
def test_lyapunov_step_function_errors_say_what_to_avoid(name, step, message):
    state = torch.get_rng_state()
    with pytest.raises(TypeError, match=message):
        hl.lyapunov_spectrum(step, 50, state_size=2, h0=np.ones((1, 2), np.float32))
    assert torch.equal(state, torch.get_rng_state())  # the global RNG is untouched


# ---------------------------------------------------------------------------- call forms
def test_the_inputs_form_warns_and_gives_the_same_numbers(make, gen):
    # 0.1 form lyapunov_spectrum(system, inputs): recorded first, so the numbers are the same
    m = make(nn.GRU, 3, 5, batch_first=True, gen=gen)
    x = torch.randn(2, 40, 3, generator=gen)
    system = hl.wrap(m, dtype=F64)
    new = lyapunov_spectrum(system, hl.record(system, x), k=3, warmup=5)
    with pytest.warns(DeprecationWarning, match=r"lyapunov_spectrum\(system, hiddenlens.record"):
        old = lyapunov_spectrum(system, x, k=3, warmup=5)
    with pytest.warns(DeprecationWarning):
        kw = lyapunov_spectrum(system, inputs=x, k=3, warmup=5)
    np.testing.assert_array_equal(old.exponents, new.exponents)
    np.testing.assert_array_equal(kw.per_sample, new.per_sample)


def test_the_recorded_trajectory_is_reused_not_rerun():
    # For a 1-D map the exponent is the time average of log|f'(s_{t-1})| along the trajectory
    # (common practice; Ott, Chaos in Dynamical Systems, 2nd ed., section 4.4). Give a trace
    # whose states are NOT the map's own trajectory: the analysis must average along them.
    def step(s, x):
        return torch.tanh(1.5 * s + x)

    system = hl.wrap(step, state_size=1, input_size=1, dtype=F64)
    rng = np.random.default_rng(0)
    x = rng.uniform(-0.2, 0.2, size=(1, 50, 1))
    states = rng.uniform(-0.9, 0.9, size=(1, 50, 1))  # not a trajectory of the map
    trace = hl.Trace(states=states, initial=np.zeros((1, 1)), inputs=x,
                     parts={"state": slice(0, 1)}, metadata={})
    res = lyapunov_spectrum(system, trace, warmup=0)
    prev = np.concatenate([trace.initial[:, None], states[:, :-1]], axis=1)[0, :, 0]
    expected = np.mean(np.log(np.abs(1.5 * (1 - np.tanh(1.5 * prev + x[0, :, 0]) ** 2))))
    np.testing.assert_allclose(res.exponents[0], expected, rtol=1e-10)
    with pytest.raises(ValueError, match="h0 was given with a trace"):
        lyapunov_spectrum(system, trace, h0=torch.zeros(1, 1))
