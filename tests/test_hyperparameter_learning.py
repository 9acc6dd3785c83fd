"""Learned momentum and betas: closed-form hypergradients against autograd and finite differences.

The reference rebuilds step ``s-1`` from the published update rules (SGD with momentum,
Adam: Kingma & Ba, ICLR 2015, Algorithm 1), written here independently of the package, with
the hyperparameter θ as a leaf, and differentiates ``L_s(w_{s-1}(θ))`` (one step back: the
state before step ``s-1`` is constant).
"""

from __future__ import annotations

import copy

import pytest
import torch

from stepsize_tower import TowerAdam, TowerAdamW, TowerSGD


@pytest.fixture(autouse=True)
def _float64_by_default():
    """These checks run in float64; restore the global default afterwards."""
    previous = torch.get_default_dtype()
    torch.set_default_dtype(torch.float64)
    yield
    torch.set_default_dtype(previous)


def _problem(seed: int = 0):
    gen = torch.Generator().manual_seed(seed)
    w_true = torch.randn(6, generator=gen)
    batches = []
    for _ in range(8):
        x = torch.randn(16, 6, generator=gen)
        batches.append((x, torch.tanh(x @ w_true) + 0.1 * torch.randn(16, generator=gen)))

    def loss(w: torch.Tensor, s: int) -> torch.Tensor:
        x, y = batches[s]
        return ((torch.tanh(x @ w) - y) ** 2).mean()

    return loss


def _sgd_direction(g, buf_prev, mu, nesterov):
    buf = g.clone() if buf_prev is None else mu * buf_prev + g
    return (g + mu * buf) if nesterov else buf


def _adam_direction(g, m_prev, v_prev, t, b1, b2, eps):
    m = b1 * m_prev + (1 - b1) * g
    v = b2 * v_prev + (1 - b2) * g * g
    return (m / (1 - b1**t)) / ((v / (1 - b2**t)).sqrt() + eps)


def _run_until(opt_factory, loss, steps):
    w = torch.zeros(6, requires_grad=True)
    opt = opt_factory([w])
    snapshots = []
    for s in range(steps):
        snapshots.append((w.detach().clone(), copy.deepcopy(opt.state_dict())))
        opt.zero_grad()
        loss(w, s).backward()
        opt.step()
    return w, opt, snapshots


@pytest.mark.parametrize("nesterov", [False, True])
def test_learned_momentum_hypergradient_matches_autograd_and_finite_differences(nesterov):
    loss = _problem()
    steps = 5
    _, opt, snaps = _run_until(
        lambda p: TowerSGD(p, lr=0.05, momentum=0.6, nesterov=nesterov, depth=1, retreat=False, learn_momentum=True),
        loss,
        steps,
    )
    # State before step s-1 (index steps-2) and the values used in step s-1.
    w_before, sd_before = snaps[steps - 2]
    buf_prev = sd_before["state"][0]["momentum_buffer"]
    ts_after_prev = snaps[steps - 1][1]["param_groups"][0]["tower"]
    mu_used = ts_after_prev["hyper_value"][0].item()
    a_used = ts_after_prev["prev_step"][0, 0].item()
    wb = w_before.clone().requires_grad_()
    g_prev = torch.autograd.grad(loss(wb, steps - 2), wb)[0]

    def next_loss(mu):  # reference: autograd through an unrolled SGD-momentum step
        d = _sgd_direction(g_prev, buf_prev, mu, nesterov)
        return loss(w_before - a_used * d, steps - 1)

    mu_leaf = torch.tensor(mu_used, requires_grad=True)
    h_autograd = torch.autograd.grad(next_loss(mu_leaf), mu_leaf)[0].item()
    eps = 1e-6  # reference: central finite differences
    h_fd = ((next_loss(torch.tensor(mu_used + eps)) - next_loss(torch.tensor(mu_used - eps))) / (2 * eps)).item()

    ts = opt.param_groups[0]["tower"]
    h_opt = ts["hyper_grad"][0].item() / (mu_used * (1 - mu_used))  # stored value is d/dlogit
    assert h_opt == pytest.approx(h_autograd, rel=1e-7, abs=1e-14)
    assert h_opt == pytest.approx(h_fd, rel=1e-5, abs=1e-10)


@pytest.mark.parametrize("cls", [TowerAdam, TowerAdamW])
def test_learned_betas_hypergradients_match_autograd_and_finite_differences(cls):
    loss = _problem(1)
    steps = 6
    wd = 0.05
    _, opt, snaps = _run_until(
        lambda p: cls(p, lr=0.01, weight_decay=wd, depth=1, retreat=False, learn_betas=True), loss, steps
    )
    w_before, sd_before = snaps[steps - 2]
    st = sd_before["state"][0]
    m_prev, v_prev, t = st["exp_avg"], st["exp_avg_sq"], st["step"].item() + 1
    ts_after_prev = snaps[steps - 1][1]["param_groups"][0]["tower"]
    b1_used, b2_used = (x.item() for x in ts_after_prev["hyper_value"])
    a_used = ts_after_prev["prev_step"][0, 0].item()
    wb = w_before.clone().requires_grad_()
    g_prev = torch.autograd.grad(loss(wb, steps - 2), wb)[0]
    decoupled = cls is TowerAdamW
    if not decoupled:
        g_prev = g_prev + wd * w_before  # Adam's L2 term is part of the gradient

    def next_loss(b1, b2):  # reference: autograd through an unrolled Adam / AdamW step
        d = _adam_direction(g_prev, m_prev, v_prev, t, b1, b2, 1e-8)
        if decoupled:
            d = d + wd * w_before
        w_next = w_before - a_used * d
        penalty = 0.0 if decoupled else 0.5 * wd * (w_next * w_next).sum()
        return loss(w_next, steps - 1) + penalty

    b1 = torch.tensor(b1_used, requires_grad=True)
    b2 = torch.tensor(b2_used, requires_grad=True)
    h1, h2 = torch.autograd.grad(next_loss(b1, b2), [b1, b2])
    e = 1e-7  # reference: central finite differences
    fd1 = (next_loss(torch.tensor(b1_used + e), b2_used) - next_loss(torch.tensor(b1_used - e), b2_used)) / (2 * e)
    fd2 = (next_loss(b1_used, torch.tensor(b2_used + e)) - next_loss(b1_used, torch.tensor(b2_used - e))) / (2 * e)

    ts = opt.param_groups[0]["tower"]
    hv = ts["hyper_grad"]
    got1 = hv[0].item() / (b1_used * (1 - b1_used))
    got2 = hv[1].item() / (b2_used * (1 - b2_used))
    assert got1 == pytest.approx(h1.item(), rel=1e-7, abs=1e-14)
    assert got2 == pytest.approx(h2.item(), rel=1e-7, abs=1e-14)
    assert got1 == pytest.approx(fd1.item(), rel=1e-4, abs=1e-10)
    assert got2 == pytest.approx(fd2.item(), rel=1e-4, abs=1e-10)


@pytest.mark.parametrize(
    "factory",
    [
        lambda p: TowerSGD(p, lr=0.5, momentum=0.9, learn_momentum=True),
        lambda p: TowerAdam(p, lr=0.5, betas=(0.5, 0.6), learn_betas=True),
    ],
)
def test_learned_hyperparameters_stay_inside_open_unit_interval(factory):
    gen = torch.Generator().manual_seed(3)
    w = torch.zeros(20, requires_grad=True)
    opt = factory([w])
    for s in range(300):
        w.grad = torch.randn(20, generator=gen) * (10.0 ** ((s % 7) - 3))
        opt.step()
        for value in opt.hyperparameters()[0].values():
            assert 0.0 < value < 1.0


def test_learn_momentum_requires_momentum_in_open_interval():
    with pytest.raises(ValueError, match="momentum"):
        TowerSGD([torch.zeros(2, requires_grad=True)], lr=0.1, momentum=0.0, learn_momentum=True)


def test_learn_betas_requires_betas_in_open_interval():
    with pytest.raises(ValueError, match="betas"):
        TowerAdam([torch.zeros(2, requires_grad=True)], betas=(0.0, 0.9), learn_betas=True)


def test_betas_do_not_move_on_the_exactly_zero_first_tangent() -> None:
    # Reference: Adam's bias correction (Kingma & Ba, ICLR 2015, Algorithm 1) makes
    # m̂_1 = g_1 and v̂_1 = g_1², so d_1 does not depend on β1 or β2: the hypergradient of the
    # betas at step 2 is exactly 0, and the learned betas must not move there. (The closed
    # forms leave rounding noise ~1e-18 whose sign a normalized level would turn into a move.)
    torch.manual_seed(0)
    w = torch.nn.Parameter(torch.randn(50, dtype=torch.float32))
    opt = TowerAdam([w], lr=1e-2, learn_betas=True)
    seen = []
    for _ in range(2):
        opt.zero_grad()
        (w.pow(3).sum() + (w * torch.linspace(-1, 1, 50)).sum()).backward()
        opt.step()
        seen.append(opt.hyperparameters()[0])
    assert seen[1] == seen[0]  # bitwise: no move at step 2
    assert seen[0]["beta1"] == pytest.approx(0.9, rel=1e-15)
    assert seen[0]["beta2"] == pytest.approx(0.999, rel=1e-15)
    opt.zero_grad()
    (w.pow(3).sum()).backward()
    opt.step()
    assert opt.hyperparameters()[0] != seen[1]  # from step 3 on, they learn
