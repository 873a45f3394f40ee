"""Integrated gradients, numeric part (viewer.core.gradients)."""

import numpy as np
import pytest

from viewer.core.gradients import METHODS, completeness_gap, ig_alphas, integrated_gradients


def _grad_min(points: np.ndarray) -> np.ndarray:
    """Gradient of F(x) = min(x1, x2) for points (S, 2); at a tie the gradient is split evenly."""
    x1, x2 = points[:, 0], points[:, 1]
    g = np.zeros_like(points)
    g[:, 0] = np.where(x1 < x2, 1.0, np.where(x1 == x2, 0.5, 0.0))
    g[:, 1] = 1.0 - g[:, 0]
    return g


def test_min_worked_example():
    # Sundararajan et al. 2017 worked example: F = min(x1, x2), x = (1, 3), x' = (0, 0) -> (1, 0).
    # By hand: on the straight path α(1, 3), x1 < x2 for every α > 0, so ∂F/∂x1 = 1, ∂F/∂x2 = 0
    # and IG = (1 - 0)·1, (3 - 0)·0; completeness: 1 + 0 = F(x) - F(x') = 1
    x, base = np.array([1.0, 3.0]), np.zeros(2)
    attr = integrated_gradients(_grad_min, x, base, steps=50, method="riemann_right")
    np.testing.assert_allclose(attr, [1.0, 0.0], atol=1e-12)
    # the trapezoid rule also evaluates α = 0, the tie, where the gradient is (0.5, 0.5), with
    # weight w = 1/(2·49): by hand IG = (1·(1 - 0.5w), 3·0.5w); the sum stays F(x) - F(x') only
    # approximately (the end-point tie is a measure-zero artefact of the quadrature)
    attr = integrated_gradients(_grad_min, x, base, steps=50)
    w = 1 / 98
    np.testing.assert_allclose(attr, [1 - 0.5 * w, 3 * 0.5 * w], rtol=1e-12)


W = np.array([[0.5, -1.0, 2.0], [1.5, 0.3, -0.7]])


def _f_quad(x):
    return float(np.sum(x**2 * W))


def _grad_quad(points):
    return 2 * points * W


def _f_smooth(x):
    return float(np.sum(np.sin(x) * W) + np.prod(x[0]))


def _grad_smooth(points):
    g = np.cos(points) * W
    row = points[:, 0, :]
    prod = np.prod(row, axis=-1, keepdims=True)
    g[:, 0, :] += prod / row
    return g


@pytest.mark.parametrize("f,grad", [(_f_quad, _grad_quad), (_f_smooth, _grad_smooth)])
def test_completeness_within_one_percent_at_50_steps(f, grad):
    # Sundararajan et al. 2017, Prop. 1: sum of attributions = F(x) - F(x')
    rng = np.random.default_rng(0)
    x = rng.uniform(0.5, 2.0, size=W.shape)
    base = rng.uniform(-0.5, 0.2, size=W.shape)
    attr = integrated_gradients(grad, x, base, steps=50, batch_size=7)
    assert attr.shape == x.shape
    assert completeness_gap(attr, f(x), f(base)) < 0.01


def test_quadratic_is_exact_with_trapezoid_and_per_dimension():
    # by hand: baseline 0, F = sum w x²: IG_i = x_i · ∫ 2 α x_i w_i dα = w_i x_i², exactly,
    # and the trapezoid rule is exact for a gradient linear in α
    x = np.array([[1.0, 2.0, -1.0], [0.5, 3.0, 1.0]])
    attr = integrated_gradients(_grad_quad, x, np.zeros_like(x), steps=5)
    np.testing.assert_allclose(attr, W * x**2, rtol=1e-12)
    # the right Riemann sum over-weights the end: average α (S + 1)/(2S) instead of 1/2,
    # i.e. every attribution is (1 + 1/S) times too large
    right = integrated_gradients(_grad_quad, x, np.zeros_like(x), steps=50, method="riemann_right")
    np.testing.assert_allclose(right, W * x**2 * (1 + 1 / 50), rtol=1e-12)


@pytest.mark.parametrize("method", METHODS)
def test_quadrature_rules(method):
    # every rule integrates a constant exactly; all but the end-point rules integrate α exactly
    alphas, weights = ig_alphas(8, method)
    assert alphas.shape == weights.shape == (8,)
    assert weights.sum() == pytest.approx(1.0)
    assert ((alphas >= 0) & (alphas <= 1)).all()
    exact_linear = method not in ("riemann_right", "riemann_left")
    assert (abs(weights @ alphas - 0.5) < 1e-12) == exact_linear


def test_gauss_legendre_integrates_polynomials():
    # Gauss-Legendre with S nodes is exact up to degree 2S - 1: ∫_0^1 α^7 dα = 1/8 with S = 4
    alphas, weights = ig_alphas(4, "gauss_legendre")
    assert weights @ alphas**7 == pytest.approx(1 / 8, abs=1e-14)


def test_bad_arguments():
    with pytest.raises(ValueError):
        ig_alphas(1, "riemann_trapezoid")
    with pytest.raises(ValueError):
        ig_alphas(10, "simpson")
    with pytest.raises(ValueError):
        integrated_gradients(_grad_quad, np.zeros(3), np.zeros(2))
