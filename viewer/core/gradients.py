"""Integrated gradients (Sundararajan et al. 2017), numeric part: path points and the sum.

For an input x, a baseline x' and a model output F, the attribution of input dimension i is
(Sundararajan et al. 2017, Eq. 1)

    IG_i(x) = (x_i - x'_i) · ∫_0^1 ∂F(x' + α(x - x')) / ∂x_i dα,

and the attributions add up to F(x) - F(x') (completeness, their Prop. 1). The integral is
replaced by a weighted sum over S points α_s on [0, 1] (their Eq. 3 is the right Riemann sum).
The gradient itself comes from the caller (the model layer), as a numpy function.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

METHODS: tuple[str, ...] = (
    "riemann_trapezoid",
    "riemann_right",
    "riemann_left",
    "riemann_middle",
    "gauss_legendre",
)


def ig_alphas(steps: int, method: str = "riemann_trapezoid") -> tuple[np.ndarray, np.ndarray]:
    """Path points α (S,) in [0, 1] and quadrature weights w (S,) summing to 1, S = ``steps``.

    ∫_0^1 g(α) dα ≈ sum_s w_s g(α_s) with S = steps gradient evaluations:

    * ``riemann_right``: α_s = s/S, s = 1..S, w_s = 1/S (Sundararajan et al. 2017, Eq. 3);
    * ``riemann_left``: α_s = (s - 1)/S; ``riemann_middle``: α_s = (s - 1/2)/S; w_s = 1/S;
    * ``riemann_trapezoid``: α_s = (s - 1)/(S - 1), w = 1/(S - 1) with both ends halved
      (exact for a gradient linear in α, i.e. a quadratic F); needs S >= 2;
    * ``gauss_legendre``: Gauss-Legendre nodes and weights mapped from [-1, 1] to [0, 1].
    """
    s = int(steps)
    if s < 1:
        raise ValueError(f"steps must be at least 1, got {steps}")
    if method == "riemann_right":
        return np.arange(1, s + 1) / s, np.full(s, 1.0 / s)
    if method == "riemann_left":
        return np.arange(s) / s, np.full(s, 1.0 / s)
    if method == "riemann_middle":
        return (np.arange(s) + 0.5) / s, np.full(s, 1.0 / s)
    if method == "riemann_trapezoid":
        if s < 2:
            raise ValueError("the trapezoid rule needs at least 2 steps")
        weights = np.full(s, 1.0 / (s - 1))
        weights[[0, -1]] *= 0.5
        return np.linspace(0.0, 1.0, s), weights
    if method == "gauss_legendre":
        nodes, weights = np.polynomial.legendre.leggauss(s)
        return (nodes + 1.0) / 2.0, weights / 2.0
    raise ValueError(f"unknown integration method {method!r}; choose one of {', '.join(METHODS)}")


def integrated_gradients(
    grad_fn: Callable[[np.ndarray], np.ndarray],
    x: np.ndarray,
    baseline: np.ndarray,
    steps: int = 50,
    method: str = "riemann_trapezoid",
    batch_size: int | None = None,
) -> np.ndarray:
    """Integrated gradients (Sundararajan et al. 2017, Eq. 1 with the sum of ``ig_alphas``).

    IG = (x - x') ⊙ sum_s w_s ∇F(x' + α_s (x - x')).

    ``grad_fn`` maps a batch of path points (S, *x.shape) to the gradients of the scalar output
    at those points, same shape. ``batch_size`` bounds how many points go to one call.
    Returns attributions of x's shape, float64.
    """
    x = np.asarray(x, dtype=np.float64)
    x0 = np.asarray(baseline, dtype=np.float64)
    if x.shape != x0.shape:
        raise ValueError(f"input {x.shape} and baseline {x0.shape} differ in shape")
    alphas, weights = ig_alphas(steps, method)  # (S,), (S,)
    delta = x - x0  # (...)
    chunk = len(alphas) if batch_size is None else max(1, int(batch_size))
    avg_grad = np.zeros_like(x)  # (...)
    for begin in range(0, len(alphas), chunk):
        a = alphas[begin : begin + chunk]  # (s,)
        points = x0[None] + a.reshape(-1, *([1] * x.ndim)) * delta[None]  # (s, ...)
        grads = np.asarray(grad_fn(points), dtype=np.float64)
        if grads.shape != points.shape:
            raise ValueError(f"grad_fn returned {grads.shape} for points {points.shape}")
        avg_grad += np.tensordot(weights[begin : begin + chunk], grads, axes=1)
    return delta * avg_grad


def completeness_gap(attributions: np.ndarray, f_input: float, f_baseline: float) -> float:
    """Relative completeness error |sum(IG) - (F(x) - F(x'))| / |F(x) - F(x')|.

    Completeness (Sundararajan et al. 2017, Prop. 1) says the gap is 0 for the exact integral;
    the quadrature leaves a small one. When F(x) = F(x') the absolute error is returned.
    """
    total = float(np.sum(attributions))
    diff = float(f_input) - float(f_baseline)
    err = abs(total - diff)
    return err / abs(diff) if diff != 0.0 else err
