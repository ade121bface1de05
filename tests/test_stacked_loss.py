"""The stacked engine's loss derivative without a graph, against autograd on the same loss
(torch's ``F.cross_entropy`` / ``F.mse_loss`` and ``torch.autograd.grad`` are the reference):
the same values bit for bit, since the same kernels run on the same upstream values."""

from __future__ import annotations

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from sgdstab.shadows.stackloss import losses_and_gradient


def _autograd(kind, outputs, stacked):
    slots, rows = outputs.shape[:2]
    leaf = outputs.detach().requires_grad_(True)
    if kind == "cross_entropy":
        per = F.cross_entropy(leaf.reshape(slots * rows, -1), stacked.reshape(-1),
                              reduction="none").view(slots, rows)
    else:
        per = F.mse_loss(leaf, stacked, reduction="none").reshape(slots, -1)
    losses = per.mean(1)
    (grad,) = torch.autograd.grad(losses.sum(), leaf)
    return losses.detach(), grad


@pytest.mark.parametrize("rows", [7, 30, 32])
@pytest.mark.parametrize("classes", [2, 3, 10, 16, 40])   # both log-softmax layouts
def test_cross_entropy_matches_autograd_bit_for_bit(rows, classes):
    g = torch.Generator().manual_seed(rows * classes)
    outputs = torch.randn(5, rows, classes, generator=g) * 3
    targets = torch.randint(0, classes, (rows,), generator=g)
    other = (targets.clone(), targets.clone())
    other[1][2] = (targets[2] + 1) % classes    # slot 3's swapped example has its own label
    hits = {3: (np.array([2]), other)}
    losses, grad = losses_and_gradient("cross_entropy", F.cross_entropy, outputs, targets, hits)
    stacked = targets.unsqueeze(0).repeat(5, 1)
    stacked[3] = other[1]
    want_losses, want_grad = _autograd("cross_entropy", outputs, stacked)
    assert torch.equal(losses, want_losses) and torch.equal(grad, want_grad)
    # with equal outputs in every slot, the swapped label changes its own slot only
    same = outputs[:1].expand(5, rows, classes).contiguous()
    _, grad = losses_and_gradient("cross_entropy", F.cross_entropy, same, targets, hits)
    assert not torch.equal(grad[3], grad[0]) and torch.equal(grad[4], grad[0])


@pytest.mark.parametrize("shape", [(7, 3), (30, 1), (32, 4)])
def test_mean_squared_error_matches_autograd_bit_for_bit(shape):
    g = torch.Generator().manual_seed(sum(shape))
    outputs = torch.randn(4, *shape, generator=g)
    targets = torch.randn(*shape, generator=g)
    losses, grad = losses_and_gradient("mse", F.mse_loss, outputs, targets, {})
    want_losses, want_grad = _autograd("mse", outputs, targets.expand(4, *shape))
    assert torch.equal(losses, want_losses) and torch.equal(grad, want_grad)


def test_ignored_targets_take_autograds_path_as_before():
    """A target of -100 (cross-entropy's ignore_index) is out of range for the graph-free path;
    the loss then goes through autograd (slot by slot with the user's loss), which ignores it."""
    g = torch.Generator().manual_seed(5)
    outputs = torch.randn(3, 6, 4, generator=g)
    targets = torch.tensor([0, 1, -100, 3, 2, 1])
    losses, grad = losses_and_gradient("cross_entropy", F.cross_entropy, outputs, targets, {})
    for j in range(3):
        leaf = outputs[j].detach().requires_grad_(True)
        value = F.cross_entropy(leaf, targets)
        (want,) = torch.autograd.grad(value, leaf)
        assert torch.allclose(losses[j], value.detach()) and torch.allclose(grad[j], want)
    assert torch.equal(grad[:, 2], torch.zeros(3, 4))   # the ignored row has no gradient
