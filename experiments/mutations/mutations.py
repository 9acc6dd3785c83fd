"""The mutation table: small, realistic slips in the package, each of which some test must catch.

One entry per mutation: a name, the file under ``stepsize_tower/``, the exact text edits
(``old`` -> ``new``; each ``old`` must occur exactly once in the file at the time it is applied)
and the tests that should catch it (pytest arguments, run from the repository root). When the
package is restructured, update the ``file`` and ``old`` snippets here; the runner reports
"snippet not found" for any that no longer match.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Mutation:
    name: str
    file: str  # relative to stepsize_tower/
    edits: tuple[tuple[str, str], ...]  # (old, new), applied in order
    tests: tuple[str, ...]  # pytest arguments (paths relative to the repository root, -k ...)
    slow: bool = False  # needs the distributed tests (a collective timeout): run with --slow


HYPERGRAD = "tests/test_hypergradients.py"
PINNED = "tests/test_mechanics_pinned.py"

MUTATIONS: list[Mutation] = [
    # --- hypergradient probes
    Mutation(
        "adam_probe_drops_eps",
        "bases/adam.py",
        (
            (
                "adam_direction(m, v, bc2s_prev.to(v.dtype), eps)",
                "adam_direction(m, v, bc2s_prev.to(v.dtype), 0.0)",
            ),
        ),
        (HYPERGRAD, "-k", "adam-adam or adamw-adam or adam_l2-sgd"),
    ),
    Mutation(
        "sgd_probe_drops_l2",
        "bases/sgd.py",
        (("g = chunks.flat(_grad(group, p, grad))", 'g = chunks.flat(-grad if group["maximize"] else grad)'),),
        (HYPERGRAD, "-k", "sgd_l2 or sgd_nesterov_l2"),
    ),
    Mutation(
        "sgd_fused_previous_gradient_drops_l2",
        "bases/sgd.py",
        (
            (
                'keep(st, "prev_grad", _grad(group, p, grad))',
                'keep(st, "prev_grad", -grad if group["maximize"] else grad)',
            ),
        ),
        (HYPERGRAD, "-k", "sgd_l2 or sgd_nesterov_l2"),
    ),
    # --- retreats
    Mutation(
        "secant_factor_minus_inverse_rho",
        "safeguards.py",
        (
            ("torch.where(secant, 1.0 / (1.0 - rho),", "torch.where(secant, -1.0 / rho,"),
            ("factor = 1.0 / (1.0 - rho)", "factor = -1.0 / rho"),
        ),
        (PINNED, "-k", "secant"),
    ),
    Mutation(
        "start_up_window_off_by_one",
        "plan.py",
        (("steps_taken < RETREAT_WINDOW", "steps_taken <= RETREAT_WINDOW"),),
        (PINNED, "-k", "first_ten"),
    ),
    Mutation(
        "retreat_keeps_the_trail",
        "safeguards.py",
        (("trail.clear(st)  # the trail held the unstable steps", "pass"),),
        (PINNED, "-k", "trail"),
    ),
    Mutation(
        "retreat_leaves_previous_step_size",
        "safeguards.py",
        (('ts["prev_step"][:, 0] = a_new', "pass"),),
        (PINNED, "-k", "secant"),
    ),
    Mutation(
        "adamw_retreat_decays_at_the_old_step_size",
        "bases/adam.py",
        (
            (
                "p.copy_(w_before * (1 - a_new * wd).to(p.dtype) - a_new.to(p.dtype) * u)",
                "p.copy_(w_before * (1 - a_prev * wd).to(p.dtype) - a_new.to(p.dtype) * u)",
            ),
        ),
        (PINNED, "-k", "secant"),
    ),
    Mutation(
        "nesterov_retreat_along_the_buffer",
        "bases/sgd.py",
        (('d = state["prev_grad"] + mu * state["momentum_buffer"]', 'd = state["momentum_buffer"]'),),
        (PINNED, "-k", "secant"),
    ),
    # --- bounds by construction
    Mutation(
        "log_step_bound_69_to_20",
        "levels/spec.py",
        (("LOG_STEP_BOUND = 69.0", "LOG_STEP_BOUND = 20.0"),),
        (PINNED, "-k", "bound"),
    ),
    Mutation(
        "log_change_clip_1_to_3",
        "levels/spec.py",
        (("MAX_LOG_CHANGE = 1.0", "MAX_LOG_CHANGE = 3.0"),),
        (PINNED, "-k", "at_most_one"),
    ),
    # --- level arithmetic
    Mutation(
        "hyper_level_bias_correction_off_by_one",
        "hyperparams.py",
        (('count = ts["hyper_count"]', 'count = ts["hyper_count"] + 1'),),
        (PINNED, "-k", "momentum"),
    ),
    Mutation(
        "growth_search_boost_exponent_off_by_one_host",
        "levels/host_path.py",
        (("min(searched * LOG_SPEEDUP, MAX_LOG_BOOST)", "min((searched + 1) * LOG_SPEEDUP, MAX_LOG_BOOST)"),),
        (PINNED, "-k", "growth_search"),
    ),
    Mutation(
        "growth_search_boost_exponent_off_by_one_tensor_ops",
        "levels/tensor_path.py",
        (("searched.clamp_min(0) * LOG_SPEEDUP", "(searched.clamp_min(0) + 1) * LOG_SPEEDUP"),),
        (PINNED, "-k", "growth_search"),
    ),
    Mutation(
        "level_bias_correction_off_by_one_host",
        "levels/host_path.py",
        (('count = float(ts["step"])', 'count = float(ts["step"]) + 1'),),
        (HYPERGRAD, "-k", "like_torch_optim"),
    ),
    Mutation(
        "level_bias_correction_off_by_one_tensor_ops",
        "levels/tensor_path.py",
        (('exp_avg, ts["exp_avg_sq"], ts["step"])', 'exp_avg, ts["exp_avg_sq"], ts["step"] + 1)'),),
        ("tests/test_level_math_paths.py",),
    ),
    # --- distributed: a rank holding no gradient skips the collective (the others wait on it)
    Mutation(
        "rank_without_gradients_skips_the_reduction",
        "engine.py",
        (("if not indexed and not sharded:", "if not indexed:"),),
        ("tests/test_distributed.py::test_zero_sharded_matches_single_process[adam]",),
        slow=True,
    ),
]
