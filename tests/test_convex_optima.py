"""Problems with a known optimum, reached from any initial step size with default settings.

Only ``lr`` is given to the optimizer (the default tower learns the rest), full batch,
float64. Each optimum comes from an outside reference:

* L2-regularized logistic regression on breast-cancer data -- reference: scikit-learn
  ``LogisticRegression`` (lbfgs, tol=1e-10);
* least squares on the diabetes data -- reference: ``numpy.linalg.lstsq``;
* the Rosenbrock function from (-1.2, 1) -- reference: SciPy ``scipy.optimize.rosen`` /
  ``rosen_der`` (Rosenbrock 1960, "An automatic method for finding the greatest or least
  value of a function"; minimum 0 at (1, 1)).

Initial step sizes span 1e-6 ... 1, six orders of magnitude around any sensible value.
Cases that do not get there within the step budget are marked xfail with the measured
numbers (they are defects of the defaults, not of the tests).
"""

from __future__ import annotations

import functools

import numpy as np
import pytest
import scipy.optimize
import torch
from sklearn.datasets import load_breast_cancer, load_diabetes
from sklearn.linear_model import LogisticRegression
from torch import Tensor

from stepsize_tower import TowerAdam, TowerSGD

BASES = {"adam": TowerAdam, "sgd": TowerSGD}
LRS = [1e-6, 1e-4, 1e-2, 1.0]
REL_TOL = 1e-3
DTYPE = torch.float64

# Measured failures within the step budgets below: (problem, base, lr) -> what happened.
# Measured on CPU, float64, default settings, at the commit that added the SGD growth guard
# (before it, SGD diverged to inf from 1e-6, 1e-4 and 1 on Rosenbrock); all six re-measured
# after the fused-kernel layout fix (only rosenbrock/sgd/1e-4 had moved).
# Since the trail forgets steps taken at far larger rates (trail.forget_larger_steps), three
# recorded cases reach their optimum: least squares, Adam, 1e-6 and 1e-4.
MEASURED_FAILURES: dict[tuple[str, str, float], str] = {
    # Since the hypergradient is lagged by a step (stepsize_tower.lag): Adam typed 1e-6 and 1e-2
    # reach the optimum (were x = (1.896, 3.596) and (0.9905, 0.9811)), typed 1e-4 no longer.
    ("rosenbrock", "adam", 1e-4): "measured with the lagged hypergradient: x = (0.8873, 0.7675), loss 0.052 "
    "after 5000 steps (exact: reached)",
    ("rosenbrock", "adam", 1.0): "measured with the trail forgetting larger steps: x = (0.99939, 0.99877), "
    "loss 3.8e-7 after 5000 steps (was (0.9946, 0.9892)); the bound is 1e-3",
    ("rosenbrock", "sgd", 1e-6): "measured: x = (0.823, 0.677), loss 0.031 after 5000 steps, still moving",
    ("rosenbrock", "sgd", 1e-4): "measured: x = (0.994, 0.988), loss 3.7e-5 after 5000 steps, still moving "
    "(re-measured after the growth guard and the first-step limit; was (0.990, 0.980), 1.1e-4)",
    ("rosenbrock", "sgd", 1e-2): "measured: one retreat cuts a_0 to ~1.6e-4, then crawls: x = (1.253, 1.570), "
    "loss 0.064 after 5000 steps",
    ("rosenbrock", "sgd", 1.0): "measured: two retreats cut a_0 to ~4e-5, then crawls: x = (1.470, 2.163), "
    "loss 0.22 after 5000 steps",
}


@pytest.fixture(autouse=True)
def _one_thread():
    """Tiny full-batch problems: intra-op threads only add overhead on a shared 2-core machine."""
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(threads)


def cases(problem: str) -> list:
    out = []
    for base in BASES:
        for lr in LRS:
            reason = MEASURED_FAILURES.get((problem, base, lr))
            marks = [pytest.mark.xfail(strict=True, raises=AssertionError, reason=reason)] if reason else []
            out.append(pytest.param(base, lr, marks=marks, id=f"{base}-lr{lr:g}"))
    return out


def minimize(params: list[Tensor], loss_fn, base: str, lr: float, steps: int) -> float:
    opt = BASES[base](params, lr=lr)  # defaults only: lr is the one thing given
    for _ in range(steps):
        opt.zero_grad()
        loss_fn().backward()
        opt.step()
    with torch.no_grad():
        return float(loss_fn())


# ---------------------------------------------------------------------------- (a) logistic regression

LAMBDA = 1e-2  # L2 strength in our per-sample objective


@functools.cache
def logistic_problem() -> tuple[np.ndarray, np.ndarray, float]:
    """Standardized breast-cancer features, labels in {-1, +1}, and scikit-learn's optimal loss."""
    x, y01 = load_breast_cancer(return_X_y=True)
    x = (x - x.mean(axis=0)) / x.std(axis=0)
    y = 2.0 * y01 - 1.0
    n = len(y)
    # Our objective:  (1/n) sum_i log(1 + exp(-y_i (x_i.w + b))) + (lambda/2) ||w||^2.
    # scikit-learn's (lbfgs, L2, intercept not penalized):
    #                 (1/2) ||w||^2 + C sum_i log(1 + exp(-y_i (x_i.w + b))).
    # Dividing the latter by n*C gives (1/n) sum_i ... + (1/(2 n C)) ||w||^2, the same
    # minimizer when lambda = 1/(n C), i.e. C = 1 / (n * lambda).
    clf = LogisticRegression(C=1.0 / (n * LAMBDA), tol=1e-10, solver="lbfgs", max_iter=10_000).fit(x, y01)
    w, b = clf.coef_[0], clf.intercept_[0]
    ref = float(np.mean(np.logaddexp(0.0, -y * (x @ w + b))) + LAMBDA / 2 * w @ w)
    return x, y, ref


def _logistic_loss(x: Tensor, y: Tensor, w: Tensor, b: Tensor) -> Tensor:
    return torch.nn.functional.softplus(-y * (x @ w + b)).mean() + LAMBDA / 2 * w @ w


def test_logistic_reference_solves_our_objective() -> None:
    # Checks the C = 1/(n lambda) derivation: scikit-learn's solution is a stationary point
    # of our objective (so its loss is the optimum, not just some loss).
    x, y01 = load_breast_cancer(return_X_y=True)
    x = (x - x.mean(axis=0)) / x.std(axis=0)
    clf = LogisticRegression(C=1.0 / (len(y01) * LAMBDA), tol=1e-10, solver="lbfgs", max_iter=10_000).fit(x, y01)
    w = torch.tensor(clf.coef_[0], dtype=DTYPE, requires_grad=True)
    b = torch.tensor(clf.intercept_[0], dtype=DTYPE, requires_grad=True)
    xt, yt = torch.tensor(x), torch.tensor(2.0 * y01 - 1.0)
    _logistic_loss(xt, yt, w, b).backward()
    assert torch.cat([w.grad, b.grad.reshape(1)]).norm() < 1e-6
    assert _logistic_loss(xt, yt, w, b).item() == pytest.approx(logistic_problem()[2], rel=1e-12)


@pytest.mark.parametrize(("base", "lr"), cases("logistic"))
def test_logistic_regression_reaches_scikit_learn_optimum(base: str, lr: float) -> None:
    # reference: scikit-learn LogisticRegression
    x, y, ref = logistic_problem()
    xt, yt = torch.tensor(x, dtype=DTYPE), torch.tensor(y, dtype=DTYPE)
    w = torch.zeros(x.shape[1], dtype=DTYPE, requires_grad=True)
    b = torch.zeros((), dtype=DTYPE, requires_grad=True)
    final = minimize([w, b], lambda: _logistic_loss(xt, yt, w, b), base, lr, steps=1500)
    assert abs(final - ref) <= REL_TOL * ref, f"loss {final:.8g} vs scikit-learn {ref:.8g}"


# ---------------------------------------------------------------------------- (b) least squares


@functools.cache
def least_squares_problem() -> tuple[np.ndarray, np.ndarray, float]:
    """Standardized diabetes features, raw targets, and numpy's least-squares optimal loss."""
    x, y = load_diabetes(return_X_y=True)
    x = (x - x.mean(axis=0)) / x.std(axis=0)
    design = np.c_[x, np.ones(len(y))]
    sol = np.linalg.lstsq(design, y, rcond=None)[0]
    ref = float(0.5 * np.mean((design @ sol - y) ** 2))
    return x, y, ref


@pytest.mark.parametrize(("base", "lr"), cases("least_squares"))
def test_least_squares_reaches_numpy_lstsq_optimum(base: str, lr: float) -> None:
    # reference: numpy.linalg.lstsq
    x, y, ref = least_squares_problem()
    xt, yt = torch.tensor(x, dtype=DTYPE), torch.tensor(y, dtype=DTYPE)
    w = torch.zeros(x.shape[1], dtype=DTYPE, requires_grad=True)
    b = torch.zeros((), dtype=DTYPE, requires_grad=True)
    final = minimize([w, b], lambda: 0.5 * ((xt @ w + b - yt) ** 2).mean(), base, lr, steps=2000)
    assert abs(final - ref) <= REL_TOL * ref, f"loss {final:.8g} vs numpy.linalg.lstsq {ref:.8g}"


# ---------------------------------------------------------------------------- (c) Rosenbrock


def rosen(x: Tensor) -> Tensor:
    """Rosenbrock's function sum_i 100 (x_{i+1} - x_i^2)^2 + (1 - x_i)^2, as in SciPy."""
    return (100.0 * (x[1:] - x[:-1] ** 2) ** 2 + (1.0 - x[:-1]) ** 2).sum()


@pytest.mark.parametrize("point", [[-1.2, 1.0], [1.0, 1.0], [0.3, -0.7], [2.0, 4.5, -1.0]])
def test_rosenbrock_matches_scipy(point: list[float]) -> None:
    # reference: scipy.optimize.rosen / rosen_der
    x = torch.tensor(point, dtype=DTYPE, requires_grad=True)
    value = rosen(x)
    value.backward()
    assert value.item() == pytest.approx(scipy.optimize.rosen(np.array(point)), rel=1e-14, abs=1e-300)
    np.testing.assert_allclose(x.grad.numpy(), scipy.optimize.rosen_der(np.array(point)), rtol=1e-13, atol=1e-13)


# Fair budget: plain gradient descent needs thousands of steps on this valley even with a
# hand-tuned step size (common practice); 5000 keeps each case to a few seconds.
ROSEN_STEPS = 5000


# The valley is chaotic in rounding: TowerAdam's native CPU kernel (same math, other rounding)
# ends typed 1e-2 at x = (0.9554, 0.8828) and typed 1 at (0.99981, 0.99961) (measured). The
# recorded outcomes are the reference path's, which runs everywhere (conftest.py).
@pytest.mark.usefixtures("reference_path")
@pytest.mark.parametrize(("base", "lr"), cases("rosenbrock"))
def test_rosenbrock_reaches_its_minimum(base: str, lr: float) -> None:
    # reference: SciPy rosen (Rosenbrock 1960): minimum 0 at (1, 1), usual start (-1.2, 1).
    x = torch.tensor([-1.2, 1.0], dtype=DTYPE, requires_grad=True)
    final = minimize([x], lambda: rosen(x), base, lr, steps=ROSEN_STEPS)
    err = (x.detach() - 1.0).abs().max().item()
    assert err <= 1e-3, f"x = {x.detach().tolist()}, loss {final:.3g} after {ROSEN_STEPS} steps"
