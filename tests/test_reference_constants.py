"""sgdstab.tracking.constants against sources outside the project.

Sources: closed forms of the logistic and squared losses (derived in comments, common practice;
SCIENCE §4 states L = max||x||, beta = max||x||^2/4 for logistic loss and Hessian X^T X / n for
squared loss), numpy.linalg.eigvalsh and scipy.special.expit as reference libraries, the explicit
Hessian from torch.autograd.functional.hessian, and scikit-learn's bundled breast-cancer data.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from scipy.special import expit
from torch import nn
from torch.func import functional_call

from sgdstab.tracking.constants import (
    SMOOTHNESS_FLOOR,
    Constants,
    estimate_lipschitz,
    estimate_smoothness,
    per_example_gradient_norms,
)

# ---------------------------------------------------------------------------------------------
# logistic loss on features x: f(w; x, y) = -y log s(w.x) - (1 - y) log(1 - s(w.x)), s = sigmoid
#   grad f = (s(w.x) - y) x                    so ||grad f|| = |s - y| ||x|| < ||x||  (y in {0,1})
#   Hessian = s (1 - s) x x^T                  top eigenvalue s (1 - s) ||x||^2 <= ||x||^2 / 4
# At w = 0: s = 1/2, |1/2 - y| = 1/2 for y in {0,1}, so ||grad f|| = ||x|| / 2 and the Hessian is
# x x^T / 4 with top eigenvalue ||x||^2 / 4. (Closed forms, common practice; SCIENCE §4.)
# ---------------------------------------------------------------------------------------------


def logistic_problem(n: int = 40, d: int = 5, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, d)) * rng.uniform(0.2, 2.0, size=(n, 1))  # varied row norms
    y = (rng.uniform(size=n) < 0.5).astype(np.float64)
    return x, y


def logistic_model(weight: np.ndarray) -> nn.Linear:
    model = nn.Linear(weight.size, 1, bias=False).double()
    with torch.no_grad():
        model.weight.copy_(torch.from_numpy(weight).reshape(1, -1))
    return model


def as_batch(x: np.ndarray, y: np.ndarray) -> tuple[torch.Tensor, torch.Tensor]:
    return torch.from_numpy(x), torch.from_numpy(y).reshape(-1, 1)


bce = F.binary_cross_entropy_with_logits


def logistic_closed_forms(x: np.ndarray, y: np.ndarray, w: np.ndarray, per_example: int):
    """Gradient norms and the expected smoothness estimate, from the closed forms above."""
    s = expit(x @ w)  # scipy as reference sigmoid
    row_norms = np.linalg.norm(x, axis=1)
    gradient_norms = np.abs(s - y) * row_norms
    mean_hessian = (x * (s * (1 - s))[:, None]).T @ x / len(x)
    value = np.linalg.eigvalsh(mean_hessian).max()
    chosen = np.argsort(-gradient_norms, kind="stable")[:per_example]
    if per_example:
        value = max(value, (s * (1 - s) * row_norms**2)[chosen].max())
    return gradient_norms, value


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_logistic_gradient_norms_closed_form(seed: int) -> None:
    x, y = logistic_problem(seed=seed)
    w = np.random.default_rng(seed + 10).normal(size=x.shape[1])
    model = logistic_model(w)
    expected, _ = logistic_closed_forms(x, y, w, per_example=0)
    norms = per_example_gradient_norms(model, as_batch(x, y), loss_fn=bce).numpy()
    np.testing.assert_allclose(norms, expected, rtol=1e-10)  # |s(w.x) - y| ||x||, exact
    lipschitz = estimate_lipschitz(model, as_batch(x, y), loss_fn=bce)
    assert lipschitz == pytest.approx(expected.max(), rel=1e-10)
    assert lipschitz <= np.linalg.norm(x, axis=1).max()  # SCIENCE §4: L = max ||x||


def test_logistic_at_zero_weights() -> None:
    x, y = logistic_problem(n=30, seed=4)
    model = logistic_model(np.zeros(x.shape[1]))
    row_norms = np.linalg.norm(x, axis=1)
    # w = 0: every per-example gradient has norm ||x|| / 2 (derivation at the top of the file)
    lipschitz = estimate_lipschitz(model, as_batch(x, y), loss_fn=bce)
    assert lipschitz == pytest.approx(0.5 * row_norms.max(), rel=1e-12)
    # w = 0: per-example Hessian x x^T / 4, top eigenvalue ||x||^2 / 4; the examples with the
    # largest gradient norms are those with the largest ||x||, so the estimate is max ||x||^2 / 4
    beta = estimate_smoothness(model, as_batch(x, y), loss_fn=bce)
    assert beta == pytest.approx(row_norms.max() ** 2 / 4, rel=1e-4)
    # the mean-loss Hessian alone is X^T X / (4 n): numpy.linalg.eigvalsh as reference
    mean_only = estimate_smoothness(model, as_batch(x, y), loss_fn=bce, per_example=0)
    reference = np.linalg.eigvalsh(x.T @ x / (4 * len(x))).max()
    assert mean_only == pytest.approx(reference, rel=1e-4)
    assert mean_only < beta  # the per-example term is what reaches max ||x||^2 / 4 here


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_logistic_smoothness_closed_form(seed: int) -> None:
    x, y = logistic_problem(seed=seed)
    w = np.random.default_rng(seed + 20).normal(size=x.shape[1]) * 0.5
    model = logistic_model(w)
    _, expected = logistic_closed_forms(x, y, w, per_example=8)
    for curvature in ("magnitude", "top"):  # the logistic Hessian is PSD: both agree
        beta = estimate_smoothness(model, as_batch(x, y), loss_fn=bce, curvature=curvature)
        assert beta == pytest.approx(expected, rel=1e-4)
        assert beta <= np.linalg.norm(x, axis=1).max() ** 2 / 4  # SCIENCE §4


# ---------------------------------------------------------------------------------------------
# squared loss 0.5 (w.x - y)^2, mean over the batch: Hessian X^T X / n (closed form, SCIENCE §4)
# ---------------------------------------------------------------------------------------------


def squared_loss(model: nn.Module, batch: tuple[torch.Tensor, torch.Tensor]) -> torch.Tensor:
    inputs, targets = batch
    return 0.5 * (model(inputs).squeeze(1) - targets).pow(2).mean()


@pytest.mark.parametrize("dtype", [torch.float64, torch.float32])
def test_squared_loss_matches_eigvalsh(dtype: torch.dtype) -> None:
    rng = np.random.default_rng(5)
    x = rng.normal(size=(50, 6)) * np.array([3.0, 1.0, 1.0, 0.5, 0.5, 0.2])
    y = rng.normal(size=50)
    model = nn.Linear(6, 1, bias=False).to(dtype)
    batch = (torch.from_numpy(x).to(dtype), torch.from_numpy(y).to(dtype))
    beta = estimate_smoothness(model, batch, step_loss=squared_loss, per_example=0)
    reference = np.linalg.eigvalsh(x.T @ x / len(x)).max()  # numpy as reference
    assert beta == pytest.approx(reference, rel=1e-4)
    # per-example Hessians x x^T have top eigenvalue ||x||^2 (rank one)
    with_examples = estimate_smoothness(model, batch, step_loss=squared_loss, per_example=50)
    assert with_examples == pytest.approx((np.linalg.norm(x, axis=1) ** 2).max(), rel=1e-4)


# ---------------------------------------------------------------------------------------------
# quadratic 0.5 w^T A w with a known spectrum: top eigenvalue and spectral norm of A
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "spectrum",
    [
        [2.0, 1.0, 0.3, -0.5],  # positive dominant
        [0.5, 0.2, -0.1, -2.0],  # negative dominant
        [1.0, 0.3, -0.2, -1.0],  # exact tie: +1 and -1 (power iteration does not settle)
        [-0.5, -1.0, -1.5, -3.0],  # negative definite: top eigenvalue < 0
    ],
)
def test_quadratic_spectrum(spectrum: list[float]) -> None:
    rng = np.random.default_rng(6)
    q, _ = np.linalg.qr(rng.normal(size=(4, 4)))
    a = torch.from_numpy(q @ np.diag(spectrum) @ q.T)
    eigenvalues = np.linalg.eigvalsh(a.numpy())  # numpy as reference
    model = nn.Linear(4, 1, bias=False).double()

    def quadratic(m: nn.Module, batch: tuple[torch.Tensor]) -> torch.Tensor:
        w = m.weight.reshape(-1)
        return (0.5 * w @ a @ w).expand(batch[0].shape[0]).mean()

    batch = (torch.zeros(3, 1, dtype=torch.float64),)
    top = estimate_smoothness(model, batch, step_loss=quadratic, per_example=0, curvature="top")
    magnitude = estimate_smoothness(model, batch, step_loss=quadratic, per_example=0)
    assert magnitude == pytest.approx(np.abs(eigenvalues).max(), rel=1e-4)
    if eigenvalues.max() > 0:
        assert top == pytest.approx(eigenvalues.max(), rel=1e-4)
    else:
        assert top == SMOOTHNESS_FLOOR  # floor keeps Constants valid


# ---------------------------------------------------------------------------------------------
# a small tanh MLP against its explicit Hessian (torch.autograd.functional.hessian + eigvalsh)
# ---------------------------------------------------------------------------------------------


def tanh_mlp(seed: int) -> nn.Sequential:
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(3, 5), nn.Tanh(), nn.Linear(5, 2)).double()  # 32 parameters


def explicit_hessian(model: nn.Module, loss) -> np.ndarray:
    names = [name for name, _ in model.named_parameters()]
    shapes = [p.shape for p in model.parameters()]
    flat = torch.cat([p.detach().reshape(-1) for p in model.parameters()])

    def of_vector(theta: torch.Tensor) -> torch.Tensor:
        parts = theta.split([s.numel() for s in shapes])
        params = {n: p.reshape(s) for n, p, s in zip(names, parts, shapes, strict=True)}
        return loss(lambda inputs: functional_call(model, params, (inputs,)))

    return torch.autograd.functional.hessian(of_vector, flat).numpy()


def mlp_squared_loss(model: nn.Module, batch: tuple[torch.Tensor, torch.Tensor]) -> torch.Tensor:
    inputs, targets = batch
    return 0.5 * (model(inputs) - targets).pow(2).sum(1).mean()


@pytest.mark.parametrize(
    ("seed", "target_scale", "negative_dominates"),
    [(0, 1.0, False), (3, 1.0, False), (1, 10.0, True)],
)
def test_mlp_against_explicit_hessian(seed: int, target_scale: float,
                                      negative_dominates: bool) -> None:
    g = torch.Generator().manual_seed(seed)
    inputs = torch.randn(16, 3, generator=g, dtype=torch.float64)
    targets = target_scale * torch.randn(16, 2, generator=g, dtype=torch.float64)
    model = tanh_mlp(seed)
    hessian = explicit_hessian(
        model, lambda forward: 0.5 * (forward(inputs) - targets).pow(2).sum(1).mean()
    )
    eigenvalues = np.linalg.eigvalsh(hessian)  # numpy as reference
    # Large residuals make the residual-curvature term of the squared loss dominate, and it is
    # indefinite: with targets scaled by 10 the most negative eigenvalue wins in magnitude.
    assert (-eigenvalues.min() > eigenvalues.max()) == negative_dominates
    batch = (inputs, targets)
    top = estimate_smoothness(model, batch, step_loss=mlp_squared_loss, per_example=0,
                              curvature="top")
    magnitude = estimate_smoothness(model, batch, step_loss=mlp_squared_loss, per_example=0)
    assert top == pytest.approx(eigenvalues.max(), rel=1e-4)
    assert magnitude == pytest.approx(np.abs(eigenvalues).max(), rel=1e-4)
    # a lower estimate: neither exceeds its reference beyond round-off
    assert top <= eigenvalues.max() * (1 + 1e-9)
    assert magnitude <= np.abs(eigenvalues).max() * (1 + 1e-9)


# ---------------------------------------------------------------------------------------------
# scikit-learn's bundled breast-cancer data (test-only dependency)
# ---------------------------------------------------------------------------------------------


def breast_cancer_features() -> tuple[np.ndarray, np.ndarray]:
    from sklearn.datasets import load_breast_cancer

    data = load_breast_cancer()
    x = (data.data - data.data.mean(axis=0)) / data.data.std(axis=0)
    x = np.hstack([x, np.ones((len(x), 1))])  # bias folded into the features
    x = x / np.linalg.norm(x, axis=1).max()  # rows rescaled to norm <= 1
    return x, data.target.astype(np.float64)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_breast_cancer_logistic(seed: int) -> None:
    x, y = breast_cancer_features()
    assert np.linalg.norm(x, axis=1).max() == pytest.approx(1.0)
    w = np.random.default_rng(seed).normal(size=x.shape[1]) * 3.0
    model = logistic_model(w)
    batch = as_batch(x, y)
    constants = Constants.estimate(model, batch, loss_fn=bce, convex=True)
    max_norm = np.linalg.norm(x, axis=1).max()
    assert constants.lipschitz <= max_norm  # SCIENCE §4: L = max ||x||
    assert constants.smoothness <= max_norm**2 / 4  # SCIENCE §4: beta = max ||x||^2 / 4
    # and the estimates are the closed-form values at this w, not just any small numbers
    gradient_norms, expected_beta = logistic_closed_forms(x, y, w, per_example=8)
    assert constants.lipschitz == pytest.approx(gradient_norms.max(), rel=1e-10)
    assert constants.smoothness == pytest.approx(expected_beta, rel=1e-4)
    assert constants.regime == "convex" and constants.source == "estimated"
