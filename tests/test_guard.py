"""The user's model and threads are never touched: private frozen copies, grad mode and thread
counts per thread, concurrent analyses on one model, and thread-count invariance."""

from __future__ import annotations

import threading

import numpy as np
import pytest
import torch
from torch import nn

import hiddenlens as hl
from hiddenlens._core.guard import grad_restored, private_copy
from hiddenlens._core.threads import num_threads, per_thread_available, single_thread

# float32 recordings: analyses agree within this across torch thread counts (docs/options.md)
THREAD_RTOL = 1e-5


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.norm = nn.BatchNorm1d(3)
        self.rnn = nn.GRU(3, 4, batch_first=True, num_layers=2, dropout=0.5)
        self.head = nn.Linear(4, 1)

    def forward(self, x):  # (B, T, 3)
        x = self.norm(x.transpose(1, 2)).transpose(1, 2)
        out, _ = self.rnn(x)
        return self.head(out[:, -1])


def fresh(make, gen):
    net = make(Net, gen=gen).train()
    net.head.weight.requires_grad_(False)
    net.rnn.weight_hh_l0.grad = torch.full_like(net.rnn.weight_hh_l0, 0.5)
    net.rnn.register_forward_hook(lambda *a: None)
    return net


def backward_pass(net, gen):
    # a real forward/backward: batch-norm statistics move, grads accumulate in place
    for p in net.parameters():
        p.requires_grad_(True)
    net.train()
    net(torch.randn(4, 5, 3, generator=gen)).sum().backward()


MUTATIONS = {  # the backward pass first: later entries add hooks that would fire in it
    "backward pass": backward_pass,
    "training flag": lambda net, gen: net.rnn.train(not net.rnn.training),
    "requires_grad": lambda net, gen: net.rnn.bias_ih_l0.requires_grad_(False),
    "grad replaced": lambda net, gen: setattr(net.rnn.weight_ih_l0, "grad",
                                              torch.ones_like(net.rnn.weight_ih_l0)),
    "forward hook": lambda net, gen: net.head.register_forward_hook(lambda *a: None),
    "removed hook": lambda net, gen: net.rnn._forward_hooks.clear(),
    "backward hook": lambda net, gen: net.register_full_backward_hook(lambda *a: None),
    "tensor hook": lambda net, gen: net.rnn.bias_hh_l1.requires_grad_(True).register_hook(
        lambda g: g),
    "buffer": lambda net, gen: net.norm.running_mean.add_(1.0),
    "parameter value": lambda net, gen: net.rnn.weight_hh_l1.data.mul_(2.0),
}


@pytest.mark.parametrize("mutation", list(MUTATIONS))
def test_snapshot_sees_each_change(make, gen, snapshot, mutation):
    # the check itself must notice every kind of change
    net = fresh(make, gen)
    snap = snapshot(net)
    MUTATIONS[mutation](net, gen)
    with pytest.raises(AssertionError):
        snap.assert_unchanged()


@pytest.mark.parametrize("mutation", list(MUTATIONS))
def test_whatever_happens_to_the_private_copy_leaves_the_model_alone(make, gen, snapshot,
                                                                     mutation):
    net = fresh(make, gen)
    snap = snapshot(net)
    work = private_copy(net)
    assert not any(m.training for m in work.modules())
    assert not any(p.requires_grad for p in work.parameters())
    assert all(p.grad is None for p in work.parameters())
    # hooks are kept on the copy (they are part of the function the module computes)
    assert len(work.rnn._forward_hooks) == len(net.rnn._forward_hooks)
    with torch.random.fork_rng(devices=[]):  # training-mode dropout in the test's own pass
        MUTATIONS[mutation](work, gen)
    snap.assert_unchanged()


def test_a_module_step_function_runs_as_a_frozen_copy(make, gen, snapshot):
    class Step(nn.Module):
        def __init__(self):
            super().__init__()
            self.lin = nn.Linear(3, 3)
            self.drop = nn.Dropout(0.5)
            self.seen = []

        def forward(self, s, x):
            self.seen.append(self.training)
            return torch.tanh(self.drop(self.lin(s)) + x)

    step = make(Step, gen=gen).train()
    snap = snapshot(step)
    system = hl.wrap(step, state_size=3, input_size=3)
    trace = hl.record(system, torch.randn(2, 20, 3, generator=gen))
    hl.lyapunov_spectrum(system, trace, k=2)
    hl.jacobian_spectra(system, trace, k=2)
    assert step.seen == []  # the user's module never ran
    assert system.model is not step and set(system.model.seen) == {False}  # eval on the copy
    snap.assert_unchanged()
    # dropout off on the copy: recording twice gives the same states
    again = hl.record(system, np.array(trace.inputs))
    np.testing.assert_array_equal(again.states, trace.states)


def test_grad_mode_comes_back_after_an_interrupt():
    assert torch.is_grad_enabled()
    with pytest.raises(KeyboardInterrupt):
        with grad_restored(), torch.no_grad():
            raise KeyboardInterrupt
    assert torch.is_grad_enabled()
    with pytest.raises(KeyboardInterrupt):
        with grad_restored():
            torch.set_grad_enabled(False)  # even a bare switch inside the block is undone
            raise KeyboardInterrupt
    assert torch.is_grad_enabled()


def test_an_interrupted_analysis_leaves_grad_mode_on():
    calls = {"n": 0}

    def step(s, x):
        calls["n"] += 1
        if calls["n"] > 1:  # the first call is the precision check; interrupt the work
            raise KeyboardInterrupt
        return 0.5 * s + x

    system = hl.wrap(step, state_size=2, input_size=1)
    trace = hl.Trace(states=np.zeros((1, 30, 2)), initial=np.zeros((1, 2)),
                     inputs=np.zeros((1, 30, 1)), parts={"state": slice(0, 2)}, metadata={})
    for run in (lambda: hl.lyapunov_spectrum(system, trace, method="jvp"),
                lambda: hl.find_fixed_points(system, trace, n_starts=4)):
        calls["n"] = 0
        with pytest.raises(KeyboardInterrupt):
            run()
        assert torch.is_grad_enabled()


# ---------------------------------------------------------------------------- threads
def _counts_seen_elsewhere(block):
    """torch.get_num_threads in the main thread and in a thread started while ``block`` runs in
    a worker thread."""
    seen = {}
    started = threading.Event()
    release = threading.Event()

    def worker():
        with block():
            seen["worker"] = torch.get_num_threads()
            started.set()
            release.wait(10)

    t = threading.Thread(target=worker)
    t.start()
    started.wait(10)
    seen["main"] = torch.get_num_threads()
    probe = threading.Thread(target=lambda: seen.__setitem__("new", torch.get_num_threads()))
    probe.start()
    probe.join()
    release.set()
    t.join()
    probe = threading.Thread(target=lambda: seen.__setitem__("after", torch.get_num_threads()))
    probe.start()
    probe.join()
    return seen


@pytest.mark.skipif(not per_thread_available(), reason="torch is not on an OpenMP runtime")
def test_thread_counts_change_for_the_calling_thread_only():
    before = torch.get_num_threads()
    target = 1 if before > 1 else 2
    seen = _counts_seen_elsewhere(lambda: num_threads(target))
    assert seen["worker"] == target
    assert seen["main"] == seen["new"] == seen["after"] == before
    seen = _counts_seen_elsewhere(single_thread)
    assert seen["worker"] == 1
    assert seen["main"] == seen["new"] == seen["after"] == before
    assert torch.get_num_threads() == before


def test_threads_option_is_checked():
    trace = hl.Trace(states=np.random.default_rng(0).standard_normal((2, 10, 3)),
                     initial=np.zeros((2, 3)), inputs=np.zeros((2, 10, 0)),
                     parts={"state": slice(0, 3)}, metadata={})
    with pytest.raises(ValueError, match="The 'threads' option of pca_trajectories must be None "
                                         "or an int >= 1; got 0."):
        hl.pca_trajectories(trace, threads=0)


@pytest.fixture(scope="module")
def gru_case():
    gen = torch.Generator().manual_seed(5)
    from tests.conftest import build

    model = build(nn.GRU, 3, 6, batch_first=True, gen=gen, scale=0.9)
    x = torch.rand(3, 60, 3, generator=gen) * 2 - 1
    return model, x


KEY_ANALYSES = {
    "spectra": (lambda s, tr, **kw: hl.jacobian_spectra(s, tr, k=3, **kw),
                ("singular_values",)),
    "gradient_flow": (lambda s, tr, **kw: hl.gradient_flow(s, tr, **kw), ("log_norms", "rates")),
    "lyapunov": (lambda s, tr, **kw: hl.lyapunov_spectrum(s, tr, k=3, **kw), ("exponents",)),
    "pca": (lambda s, tr, **kw: hl.pca_trajectories(s, tr, k=2, **kw),
            ("explained_variance",)),
}


def _main_numbers(result, names):
    return {n: np.asarray(getattr(result, n), dtype=float) for n in names
            if getattr(result, n, None) is not None}


@pytest.mark.parametrize("name", list(KEY_ANALYSES))
def test_results_agree_at_one_and_two_threads(name, gru_case):
    # thread-count invariance within the documented tolerance on float32 recordings
    model, x = gru_case
    run, fields = KEY_ANALYSES[name]
    system = hl.wrap(model)
    trace = hl.record(system, x)
    one = _main_numbers(run(system, trace, threads=1), fields)
    two = _main_numbers(run(system, trace, threads=2), fields)
    assert one
    for field, a in one.items():
        np.testing.assert_allclose(two[field], a, rtol=THREAD_RTOL, atol=1e-12, err_msg=field)


class CellStep(nn.Module):
    """A module step function s_t = F(s_{t-1}, x_t) with dropout (off in analyses)."""

    def __init__(self):
        super().__init__()
        self.cell = nn.RNNCell(3, 6)
        self.drop = nn.Dropout(0.3)
        self.hidden_size = 6

    def forward(self, s, x):
        return self.cell(self.drop(x), s)


def test_two_analyses_at_once_on_one_model(gru_case, snapshot, make, gen):
    # Two threads analysing one model return what each returns alone, and leave it as it was;
    # both a module-backed system and a module step function.
    model, x = gru_case
    step = make(CellStep, gen=gen).double().train()
    systems = {"module": hl.wrap(model), "step module": hl.wrap(step, state_size=6,
                                                                input_size=3,
                                                                dtype=torch.float64)}
    snaps = [snapshot(model), snapshot(step)]
    for system in systems.values():
        trace = hl.record(system, x)
        jobs = {
            "lyapunov": lambda s=system, tr=trace: hl.lyapunov_spectrum(s, tr, k=3).exponents,
            "spectra": lambda s=system, tr=trace: hl.jacobian_spectra(s, tr, k=3).singular_values,
            "fixed": lambda s=system, tr=trace: hl.find_fixed_points(s, tr, n_starts=8).points,
        }
        alone = {n: job() for n, job in jobs.items()}
        together = {}
        errors = []

        def run(n, job):
            try:
                together[n] = job()
            except BaseException as err:  # pragma: no cover - reported below
                errors.append(err)

        threads = [threading.Thread(target=run, args=item) for item in jobs.items()] * 1
        threads += [threading.Thread(target=run, args=(n + " again", job))
                    for n, job in jobs.items()]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert not errors, errors
        for n, value in alone.items():
            np.testing.assert_allclose(together[n], value, rtol=THREAD_RTOL)
            np.testing.assert_allclose(together[n + " again"], value, rtol=THREAD_RTOL)
    for snap in snaps:
        snap.assert_unchanged()
