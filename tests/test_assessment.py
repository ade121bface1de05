"""Applicability to the optimizer, weight decay, and the assumption audit's threshold."""

from __future__ import annotations

import torch

from sgdstab import Constants
from sgdstab.assessment import assumption_breaches, effective_constants, optimizer_reason


def _params():
    return [torch.nn.Parameter(torch.zeros(2))]


def test_only_plain_sgd_qualifies():
    assert optimizer_reason(torch.optim.SGD(_params(), lr=0.1)) == ""
    assert "momentum 0.9" in optimizer_reason(torch.optim.SGD(_params(), lr=0.1, momentum=0.9))
    assert "Adam" in optimizer_reason(torch.optim.Adam(_params()))
    assert "maximize" in optimizer_reason(torch.optim.SGD(_params(), lr=0.1, maximize=True))


def test_weight_decay_adds_to_smoothness_and_strong_convexity_of_a_convex_loss():
    declared = Constants(lipschitz=1.0, smoothness=2.0, convex=True)
    decayed = effective_constants(declared, torch.optim.SGD(_params(), lr=0.1, weight_decay=0.3))
    assert decayed.smoothness == 2.3 and decayed.strong_convexity == 0.3
    assert decayed.regime == "strongly_convex"
    plain = effective_constants(declared, torch.optim.SGD(_params(), lr=0.1))
    assert plain == declared
    nonconvex = effective_constants(Constants(lipschitz=1.0, smoothness=2.0),
                                    torch.optim.SGD(_params(), lr=0.1, weight_decay=0.3))
    assert nonconvex.strong_convexity == 0.0 and nonconvex.smoothness == 2.3


def test_breaches_ignore_round_off_and_catch_real_excess():
    assert assumption_breaches([1.0 + 1e-7], [1.0], parameter_norm=1.0) == []
    assert assumption_breaches([0.0], [None], parameter_norm=1.0) == []
    found = assumption_breaches([0.5, 1.1], [1.0, 1.0], parameter_norm=1.0)
    assert len(found) == 1 and found[0].startswith("shadow_1")
