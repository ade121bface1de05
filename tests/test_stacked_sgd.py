"""The stacked engine's own SGD step against torch's: ``SGD.step`` with ``foreach=True`` on the
same tensors (torch's ``_multi_tensor_sgd`` is the reference), bit for bit, over every setting
and over several steps (the first one creates the momentum buffers)."""

from __future__ import annotations

import copy
import itertools

import pytest
import torch
from torch import nn

from sgdstab.shadows.stacksgd import stacked_sgd_step


def _stacked(seed: int) -> list[nn.Parameter]:
    g = torch.Generator().manual_seed(seed)
    return [nn.Parameter(torch.randn(9, *shape, generator=g))
            for shape in [(16, 8), (16,), (3, 16), (3,)]]


def _grads(params: list[nn.Parameter], step: int) -> list[torch.Tensor]:
    g = torch.Generator().manual_seed(100 + step)
    return [torch.randn(p.shape, generator=g) for p in params]


SETTINGS = [dict(momentum=m, dampening=d, nesterov=n, weight_decay=w, maximize=x)
            for m, d, n, w, x in itertools.product((0.0, 0.9), (0.0, 0.1), (False, True),
                                                   (0.0, 1e-2), (False, True))
            if not (n and (m == 0 or d != 0))]   # torch refuses nesterov without momentum


@pytest.mark.parametrize("settings", SETTINGS, ids=lambda s: "-".join(
    f"{k}{v}" for k, v in s.items()))
def test_the_stacked_sgd_step_is_torchs_foreach_step_bit_for_bit(settings):
    ours = _stacked(0)
    theirs = copy.deepcopy(ours)
    groups = lambda ps: [{"params": ps[:2], "lr": 0.05},   # noqa: E731
                         {"params": ps[2:], "lr": 0.01}]
    mine = torch.optim.SGD(groups(ours), lr=0.1, foreach=True, **settings)
    torchs = torch.optim.SGD(groups(theirs), lr=0.1, foreach=True, **settings)
    for step in range(3):
        for ps in (ours, theirs):
            for p, g in zip(ps, _grads(ps, step)):
                p.grad = g
        assert stacked_sgd_step(mine)
        torchs.step()
        for a, b in zip(ours, theirs):
            assert torch.equal(a, b)
            assert torch.equal(a.grad, b.grad)   # nesterov updates the gradient in place
            if settings["momentum"]:
                assert torch.equal(mine.state[a]["momentum_buffer"],
                                   torchs.state[b]["momentum_buffer"])
            else:
                assert not mine.state.get(a)
    # the step moved the parameters (a check that cannot tell no step from a step would pass)
    assert not torch.equal(ours[0], _stacked(0)[0])


def test_settings_it_does_not_cover_are_left_to_the_optimizer():
    params = _stacked(1)
    for p in params:
        p.grad = torch.ones_like(p)
    before = [p.detach().clone() for p in params]
    for optimizer in (torch.optim.SGD(params, lr=0.1, foreach=False),
                      torch.optim.SGD(params, lr=0.1),                # foreach left to torch
                      torch.optim.SGD(params, lr=torch.tensor(0.1), foreach=True),
                      torch.optim.SGD(params, lr=0.1, foreach=True, differentiable=True),
                      torch.optim.Adam(params, lr=0.1, foreach=True)):
        assert not stacked_sgd_step(optimizer)
    assert all(torch.equal(p, b) for p, b in zip(params, before))
