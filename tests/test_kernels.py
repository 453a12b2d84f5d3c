"""Cubic spline kernel (engine.kernels) against its analytic properties.

Source: Monaghan 1992, "Smoothed Particle Hydrodynamics", Annu. Rev. Astron.
Astrophys. 30:543-574 (h-form, confirmed citation); the support-radius form of
Koschier, Bender, Solenthaler & Teschner 2019 (Eurographics tutorial,
arXiv:2009.06944; form from memory). Lattice sum 0.99997 at H = 2 dx: derived
numerically in the physics references section 1 [D].
"""

import numpy as np
import pytest
from scipy import integrate

from engine.kernels import kernel, kernel_derivative, kernel_gradient, kernel_terms


def test_kernel_integrates_to_one():
    """4 pi int_0^H W(r) r^2 dr = 1 (normalisation; Monaghan 1992). Quadrature tolerance 1e-10."""
    h = 0.037
    value, _ = integrate.quad(lambda r: 4.0 * np.pi * r * r * kernel(r, h), 0.0, h, points=[0.5 * h], limit=200)
    assert value == pytest.approx(1.0, abs=1e-10)


def test_lattice_sum_matches_reference_value():
    """sum_j V_j W_ij on a cubic lattice with H = 2 dx is 0.99997 (physics references
    section 1, derived [D]); the 5-digit value is checked to its last digit."""
    dx = 0.01
    grid = np.stack(np.meshgrid(*[np.arange(-3, 4)] * 3, indexing="ij"), axis=-1).reshape(-1, 3) * dx
    total = dx**3 * kernel(np.linalg.norm(grid, axis=1), 2 * dx).sum()
    assert total == pytest.approx(0.99997, abs=5e-6)


def test_h_form_and_h_support_form_agree():
    """The H-form equals Monaghan's h-form with H = 2h (Monaghan 1992); 1e-12 relative."""
    h_small = 0.01
    r = np.linspace(0, 2 * h_small, 57)
    q = r / h_small
    monaghan = np.where(q < 1, 1 - 1.5 * q**2 + 0.75 * q**3, 0.25 * np.clip(2 - q, 0, None) ** 3) / (np.pi * h_small**3)
    np.testing.assert_allclose(kernel(r, 2 * h_small), monaghan, rtol=1e-12, atol=1e-9)


def test_derivative_matches_finite_differences():
    """dW/dr against central differences (step 1e-7 H; error O(step^2) ~ 1e-6 relative)."""
    h = 0.05
    r = np.linspace(0.013 * h, 0.987 * h, 41)
    r = r[np.abs(r - 0.5 * h) > 1e-3 * h]  # the second derivative jumps at q = 1/2
    step = 1e-7 * h
    numeric = (kernel(r + step, h) - kernel(r - step, h)) / (2 * step)
    np.testing.assert_allclose(kernel_derivative(r, h), numeric, rtol=1e-5, atol=1e-6 * np.abs(numeric).max())


def test_gradient_is_antisymmetric_and_matches_finite_differences():
    """grad_i W(x_i - x_j) = -grad_j W, and matches a numerical gradient of W (1e-5 relative)."""
    rng = np.random.default_rng(3)
    h = 0.1
    offsets = rng.uniform(-0.7 * h, 0.7 * h, size=(50, 3))
    grad = kernel_gradient(offsets, h)
    np.testing.assert_array_equal(kernel_gradient(-offsets, h), -grad)
    step = 1e-7 * h
    numeric = np.zeros_like(offsets)
    for axis in range(3):
        e = np.zeros(3)
        e[axis] = step
        numeric[:, axis] = (kernel(np.linalg.norm(offsets + e, axis=1), h)
                            - kernel(np.linalg.norm(offsets - e, axis=1), h)) / (2 * step)
    np.testing.assert_allclose(grad, numeric, rtol=1e-5, atol=1e-6 * np.abs(numeric).max())


def test_kernel_terms_agree_with_separate_functions():
    """The fused pair function equals W and (dW/dr)/r (and gives a zero gradient at r = 0)."""
    h = 0.02
    r = np.concatenate([[0.0], np.linspace(1e-6, 1.2 * h, 300)])
    w, f = kernel_terms(r, h)
    np.testing.assert_allclose(w, kernel(r, h), rtol=1e-12, atol=1e-6)
    np.testing.assert_allclose(f[1:] * r[1:], kernel_derivative(r[1:], h), rtol=1e-10, atol=1e-3)
    assert np.isfinite(f).all() and (w[r >= h] == 0).all() and (f[r >= h] == 0).all()
