"""``preserved`` gives the user's model back as it was, however the block ends."""

from __future__ import annotations

import pytest
import torch
from torch import nn

from hiddenlens._guard import preserved

pytestmark = pytest.mark.usefixtures("one_thread")


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
    net(torch.randn(4, 5, 3, generator=gen)).sum().backward()


MUTATIONS = {  # the backward pass first: later entries add hooks that would fire in it
    "backward pass": backward_pass,
    "training flag": lambda net, gen: net.rnn.train(not net.rnn.training),
    "requires_grad": lambda net, gen: net.rnn.bias_ih_l0.requires_grad_(False),
    "grad replaced": lambda net, gen: setattr(net.rnn.weight_ih_l0, "grad",
                                              torch.ones_like(net.rnn.weight_ih_l0)),
    "grad in place": lambda net, gen: net.rnn.weight_hh_l0.grad.add_(1.0),
    "grad cleared": lambda net, gen: setattr(net.rnn.weight_hh_l0, "grad", None),
    "forward hook": lambda net, gen: net.head.register_forward_hook(lambda *a: None),
    "pre-hook with kwargs": lambda net, gen: net.rnn.register_forward_pre_hook(
        lambda *a: None, with_kwargs=True),
    "removed hook": lambda net, gen: net.rnn._forward_hooks.clear(),
    "backward hook": lambda net, gen: net.register_full_backward_hook(lambda *a: None),
    "state-dict hook": lambda net, gen: net.register_state_dict_pre_hook(lambda *a: None),
    "tensor hook": lambda net, gen: net.rnn.bias_hh_l1.register_hook(lambda g: g),
    "buffer": lambda net, gen: net.norm.running_mean.add_(1.0),
    "global RNG": lambda net, gen: torch.rand(3),
}


@pytest.mark.parametrize("mutation", list(MUTATIONS))
def test_snapshot_sees_each_change(make, gen, snapshot, mutation):
    # the check itself must notice every kind of change the guard undoes
    net = fresh(make, gen)
    snap = snapshot(net)
    MUTATIONS[mutation](net, gen)
    with pytest.raises(AssertionError):
        snap.assert_unchanged()


@pytest.mark.parametrize("ending", ["normal", "ValueError", "KeyboardInterrupt"])
@pytest.mark.parametrize("mutation", list(MUTATIONS))
def test_preserved_restores_everything(make, gen, snapshot, mutation, ending):
    net = fresh(make, gen)
    snap = snapshot(net)
    error = {"normal": None, "ValueError": ValueError, "KeyboardInterrupt": KeyboardInterrupt}
    raised = error[ending]

    def body():
        with preserved(net, eval_mode=False):
            MUTATIONS[mutation](net, gen)
            if raised is not None:
                raise raised("stop")

    if raised is None:
        body()
    else:
        with pytest.raises(raised):
            body()
    snap.assert_unchanged()


def test_all_changes_at_once_then_interrupt(make, gen, snapshot):
    net = fresh(make, gen)
    snap = snapshot(net)
    with pytest.raises(KeyboardInterrupt):
        with preserved(net, eval_mode=False):
            for mutate in MUTATIONS.values():
                mutate(net, gen)
            raise KeyboardInterrupt
    snap.assert_unchanged()


def test_eval_mode_inside_the_block(make, gen, snapshot):
    net = fresh(make, gen)
    snap = snapshot(net)
    with preserved(net):
        assert not any(m.training for m in net.modules())
        # dropout and batch-norm updates are off: two calls agree
        x = torch.randn(2, 5, 3, generator=gen)
        torch.testing.assert_close(net(x), net(x))
    with preserved(net, eval_mode=False):
        assert all(m.training for m in net.modules())
    snap.assert_unchanged()


def test_none_guards_the_global_rng():
    before = torch.get_rng_state()
    with pytest.raises(RuntimeError):
        with preserved(None):
            torch.randn(10)
            raise RuntimeError("stop")
    assert torch.equal(torch.get_rng_state(), before)
