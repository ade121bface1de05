"""The tracker's bounds on real data: logistic regression on scikit-learn's breast-cancer set.

Source of the data: scikit-learn's bundled copy of the Wisconsin diagnostic breast-cancer dataset
(sklearn.datasets.load_breast_cancer; test-only dependency). Standardising the features is common
practice. Closed forms (SCIENCE.md §4, from memory of the standard logistic-loss derivation): for
f(w; x, y) = log(1 + exp(-s w.x)) the gradient is bounded by ||x|| and the Hessian by ||x||^2 / 4,
so with the bias folded into x and every row scaled to norm <= 1, L = max ||x|| and
beta = max ||x||^2 / 4. Hardt, Recht & Singer 2016 (convex case, statements from memory): with
alpha <= 2/beta every shadow's divergence stays within its pathwise bound.
"""

from __future__ import annotations

import warnings

import pytest
import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import AssumptionWarning, Constants, LockstepWarning, StabilityTracker

datasets = pytest.importorskip("sklearn.datasets")


def _data():
    bunch = datasets.load_breast_cancer()
    x = torch.tensor(bunch.data, dtype=torch.float64)
    y = torch.tensor(bunch.target, dtype=torch.float64)
    x = (x - x.mean(0)) / x.std(0)
    x = torch.cat([x, torch.ones(len(x), 1, dtype=x.dtype)], dim=1)   # bias folded into x
    x = x / x.norm(dim=1, keepdim=True).clamp(min=1.0)                 # rows scaled to norm <= 1
    order = torch.randperm(len(x), generator=torch.Generator().manual_seed(0))
    x, y = x[order], y[order]
    return TensorDataset(x[:400], y[:400]), TensorDataset(x[400:], y[400:]), x


def logistic(outputs, targets, reduction="mean"):
    return F.binary_cross_entropy_with_logits(outputs.squeeze(-1), targets, reduction=reduction)


def _run(constants, epochs=3, lr=0.5):
    train_set, held_out, x = _data()
    torch.manual_seed(0)
    model = nn.Linear(x.shape[1], 1, bias=False).double()
    opt = torch.optim.SGD(model.parameters(), lr=lr)
    tracker = StabilityTracker(model, opt, loss_fn=logistic, train_set=train_set, shadows=4,
                               replacements=held_out, constants=constants, seed=1)
    loader = DataLoader(train_set, batch_size=8, shuffle=True,
                        generator=torch.Generator().manual_seed(2))
    readings = []
    for _ in range(epochs):
        for features, label in tracker.batches(loader):
            opt.zero_grad()
            logistic(model(features), label).backward()
            opt.step()
        readings.append(tracker.finish_epoch())
    return readings, x


def _closed_form_constants(x):
    norm = float(x.norm(dim=1).max())
    return Constants(lipschitz=norm, smoothness=norm ** 2 / 4, convex=True)


def test_every_shadow_stays_within_its_pathwise_bound_and_the_audits_stay_silent():
    _, _, x = _data()
    with warnings.catch_warnings():
        warnings.simplefilter("error", AssumptionWarning)
        warnings.simplefilter("error", LockstepWarning)
        readings, _ = _run(_closed_form_constants(x))
    assert readings[0].audit_divergence == 0.0
    for reading in readings:
        assert not reading.assumption_violated
        assert reading.bounds["path_applicable"]
        for measured, bound in zip(reading.divergence, reading.path_bound):
            assert measured <= bound
        assert max(reading.divergence) > 0
        # expected bound of the convex closed form: 2 L^2 / n * sum(alpha_t)
        L = _closed_form_constants(x).lipschitz
        assert reading.expected_bound == pytest.approx(2 * L ** 2 / 400 * 0.5 * reading.steps,
                                                       rel=1e-9)
    # the uniform-stability constant is L * max_j pathwise_j >= L * every shadow's pathwise bound
    last = readings[-1]
    assert last.uniform_stability >= L * max(last.path_bound) * (1 - 1e-12)


def test_understated_constants_make_the_assumption_audit_fire():
    _, _, x = _data()
    honest = _closed_form_constants(x)
    understated = Constants(lipschitz=honest.lipschitz / 50, smoothness=honest.smoothness,
                            convex=True)
    with pytest.warns(AssumptionWarning, match="ASSUMPTIONS VIOLATED") as caught:
        readings, _ = _run(understated, epochs=1)
    message = str(next(w.message for w in caught if w.category is AssumptionWarning))
    # the likely causes, in order: the tool's own configuration first, then the constants
    assert message.index("(1)") < message.index("sum-reduced") < message.index("(2)") < \
        message.index("declared constants are too small") < message.index("(3)")
    assert readings[-1].assumption_violated
    assert any("assumption audit failed" in note for note in readings[-1].notes)


def test_a_step_size_above_two_over_beta_makes_the_bounds_not_applicable():
    _, _, x = _data()
    constants = _closed_form_constants(x)
    readings, _ = _run(constants, epochs=1, lr=2.5 / constants.smoothness)
    reading = readings[0]
    assert reading.expected_bound is None and not reading.bounds["path_applicable"]
    assert "2/beta" in reading.bounds["path_reason"]
