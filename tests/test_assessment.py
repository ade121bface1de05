"""Applicability to the optimizer, weight decay, and the assumption audit's threshold."""

from __future__ import annotations

import numpy as np
import torch

from sgdstab import Constants
from sgdstab.theory.assessment import (
    GroupSettings,
    assumption_breaches,
    effective_constants,
    groups_reason,
    loss_bound_reason,
)
from sgdstab.tracking.optimizer_rule import optimizer_reason


def _params():
    return [torch.nn.Parameter(torch.zeros(2))]


def test_only_plain_sgd_qualifies():
    assert optimizer_reason(torch.optim.SGD(_params(), lr=0.1)) == ""
    assert "momentum 0.9" in optimizer_reason(torch.optim.SGD(_params(), lr=0.1, momentum=0.9))
    assert "Adam" in optimizer_reason(torch.optim.Adam(_params()))
    assert "maximize" in optimizer_reason(torch.optim.SGD(_params(), lr=0.1, maximize=True))


def _observed(*groups: dict) -> GroupSettings:
    settings = GroupSettings()
    settings.observe([dict(g) for g in groups])
    return settings


def test_weight_decay_adds_to_smoothness_and_strong_convexity_of_a_convex_loss():
    declared = Constants(lipschitz=1.0, smoothness=2.0, convex=True)
    decayed = effective_constants(declared, _observed({"lr": 0.1, "weight_decay": 0.3}))
    assert decayed.smoothness == 2.3 and decayed.strong_convexity == 0.3
    assert decayed.regime == "strongly_convex"
    plain = effective_constants(declared, _observed({"lr": 0.1, "weight_decay": 0.0}))
    assert plain == declared
    nonconvex = effective_constants(Constants(lipschitz=1.0, smoothness=2.0),
                                    _observed({"lr": 0.1, "weight_decay": 0.3}))
    assert nonconvex.strong_convexity == 0.0 and nonconvex.smoothness == 2.3


def test_a_bias_group_without_decay_leaves_no_strong_convexity():
    declared = Constants(lipschitz=1.0, smoothness=2.0, convex=True)
    groups = _observed({"lr": 0.1, "weight_decay": 0.3}, {"lr": 0.1, "weight_decay": 0.0})
    effective = effective_constants(declared, groups)
    assert effective.strong_convexity == 0.0 and effective.regime == "convex"
    assert effective.smoothness == 2.3 and groups.several
    # A slower decayed group: ratios r = (1, 0.25), decays (0.2, 0.4): beta + max(0.2, 0.1),
    # gamma * 0.25 + min(0.2, 0.1) with gamma = 0.4.
    strong = Constants(lipschitz=1.0, smoothness=2.0, strong_convexity=0.4, convex=True)
    groups = _observed({"lr": 0.2, "weight_decay": 0.2}, {"lr": 0.05, "weight_decay": 0.4})
    effective = effective_constants(strong, groups)
    assert abs(effective.smoothness - 2.2) < 1e-12
    assert abs(effective.strong_convexity - (0.4 * 0.25 + 0.1)) < 1e-12


def test_changing_group_ratios_make_the_bounds_not_applicable():
    groups = GroupSettings()
    assert groups.observe([{"lr": 0.2}, {"lr": 0.1}]) == 0.2
    assert groups.observe([{"lr": 0.1}, {"lr": 0.05}]) == 0.1   # same shape: fine
    assert groups_reason(groups) == ""
    groups.observe([{"lr": 0.1}, {"lr": 0.1}])                  # ratio 0.5 -> 1
    assert "step 3" in groups_reason(groups) and "constant" in groups_reason(groups)
    restored = GroupSettings.from_state_dict(groups.state_dict())
    assert restored.changed == groups.changed and restored.ratios == groups.ratios


def test_the_group_rule_on_a_quadratic_is_contractive_as_claimed():
    """Rescaling check on f(w) = 1/2 w^T A w (+ linear terms, which cancel in differences).

    Two groups with step sizes alpha_g = r_g alpha and decays lambda_g: the difference of two
    runs evolves by M = I - D_alpha (A + Lambda). In u = w / sqrt(r) it evolves by
    S^-1 M S (S = diag(sqrt(r))); the claim is ||S^-1 M S|| <= 1 - alpha gamma_u with
    beta_u = beta + max lambda_g r_g, gamma_u = gamma min r + min lambda_g r_g, whenever
    alpha <= 2 / (beta_u + gamma_u); and ||w - w'|| <= ||u - u'||. (Our derivation; numpy.)"""
    rng = np.random.default_rng(0)
    worst, naive_wrong = 0.0, 0
    for trial in range(200):
        d1, d2 = 3, 2
        q = rng.normal(size=(d1 + d2, d1 + d2))
        eig = rng.uniform(0.05, 2.0, size=d1 + d2)
        a = q @ np.diag(eig) @ q.T
        a = (a + a.T) / 2
        w, _ = np.linalg.eigh(a)
        beta, gamma = float(w.max()), float(w.min())
        ratios = np.array([1.0, rng.uniform(0.1, 1.0)])
        decays = rng.uniform(0.0, 0.5, size=2) * (trial % 3 != 0)
        r = np.repeat(ratios, [d1, d2])
        lam = np.repeat(decays, [d1, d2])
        beta_u = beta + float((decays * ratios).max())
        gamma_u = gamma * float(ratios.min()) + float((decays * ratios).min())
        alpha = rng.uniform(0.1, 1.0) * 2.0 / (beta_u + gamma_u)
        step = np.eye(d1 + d2) - np.diag(alpha * r) @ (a + np.diag(lam))
        scale = np.diag(np.sqrt(r))
        in_u = np.linalg.inv(scale) @ step @ scale
        norm = np.linalg.norm(in_u, 2)
        assert norm <= (1 - alpha * gamma_u) * (1 + 1e-9) + 1e-12, (trial, norm)
        worst = max(worst, norm / (1 - alpha * gamma_u))
        # the largest decay taken as the strong convexity claims more contraction than there is
        naive_wrong += norm > (1 - alpha * (gamma + float(decays.max()))) * (1 + 1e-9)
    assert worst <= 1 + 1e-9
    assert naive_wrong > 0   # so this check can tell a wrong rule from ours


def test_breaches_ignore_round_off_and_catch_real_excess():
    assert assumption_breaches([1.0 + 1e-7], [1.0], parameter_norm=1.0) == []
    assert assumption_breaches([0.0], [None], parameter_norm=1.0) == []
    found = assumption_breaches([0.5, 1.1], [1.0, 1.0], parameter_norm=1.0)
    assert len(found) == 1 and found[0].startswith("shadow_1")


def test_a_declared_loss_bound_below_an_observed_loss_is_caught():
    declared = Constants(lipschitz=1.0, smoothness=2.0, loss_bound=0.5, convex=True)
    assert loss_bound_reason(declared, 0.49) == ""
    assert loss_bound_reason(declared, None) == ""
    reason = loss_bound_reason(declared, 1.13)
    assert "M = 0.5" in reason and "1.13" in reason and "not applicable" in reason
    assert loss_bound_reason(Constants(lipschitz=1.0, smoothness=2.0), 9.0) == ""
