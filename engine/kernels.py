"""SPH smoothing kernel: the cubic spline in support-radius form.

Legend: r = distance, H = ``support_radius`` (W = 0 for r >= H), q = r / H.

    W(q)   = 8/(pi H^3) * (6(q^3 - q^2) + 1)   for 0 <= q <= 1/2
           = 8/(pi H^3) * 2(1 - q)^3           for 1/2 < q <= 1
    dW/dr  = 8/(pi H^4) * 6(3q^2 - 2q)         for q <= 1/2
           = 8/(pi H^4) * (-6(1 - q)^2)        for 1/2 < q <= 1

Source: Monaghan 1992, "Smoothed Particle Hydrodynamics", Annu. Rev. Astron.
Astrophys. 30:543-574 (h-form, support 2h); the H-form is the one in Koschier,
Bender, Solenthaler & Teschner 2019, "Smoothed Particle Hydrodynamics
Techniques for the Physics Based Simulation of Fluids and Solids",
Eurographics tutorial, arXiv:2009.06944 (form from memory; normalisation
checked numerically in tests/test_kernels.py).
"""

import numpy as np


def kernel(distances, support_radius) -> np.ndarray:
    """Cubic spline W(r) in 1/m^3 for an array of distances (m)."""
    q = np.asarray(distances, dtype=np.float64) / support_radius
    sigma = 8.0 / (np.pi * support_radius**3)
    inner = 6.0 * (q * q * q - q * q) + 1.0
    outer = 2.0 * np.clip(1.0 - q, 0.0, None) ** 3
    return sigma * np.where(q <= 0.5, inner, outer)


def kernel_derivative(distances, support_radius) -> np.ndarray:
    """dW/dr in 1/m^4 for an array of distances (m); zero outside the support."""
    q = np.asarray(distances, dtype=np.float64) / support_radius
    sigma = 8.0 / (np.pi * support_radius**4)
    inner = 6.0 * (3.0 * q * q - 2.0 * q)
    outer = -6.0 * np.clip(1.0 - q, 0.0, None) ** 2
    return sigma * np.where(q <= 0.5, inner, outer)


def kernel_gradient(offsets, support_radius) -> np.ndarray:
    """Gradient of W with respect to x_i for offsets x_i - x_j.

    Args:
        offsets: (P, 3) float array of x_i - x_j in metres.
        support_radius: H in metres.

    Returns:
        (P, 3) float64 array, dW/dr * (x_i - x_j) / r; zero where r == 0.
    """
    offsets = np.asarray(offsets, dtype=np.float64)
    r = np.linalg.norm(offsets, axis=1)
    dwdr = kernel_derivative(r, support_radius)
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where(r > 1e-12 * support_radius, dwdr / r, 0.0)
    return offsets * scale[:, None]


def kernel_terms(distances, support_radius) -> tuple[np.ndarray, np.ndarray]:
    """W(r) and (dW/dr)/r together, for pair loops (one pass over the distances).

    Args:
        distances: (P,) float distances in metres, >= 0.
        support_radius: H in metres.

    Returns:
        ``(w, f)``: (P,) float64 W in 1/m^3 and (P,) float64 (dW/dr)/r in 1/m^5,
        so the gradient of W with respect to x_i is ``f * (x_i - x_j)``. On the
        inner branch (dW/dr)/r = 8/(pi H^5) * 6(3q - 2) has a finite limit at
        r = 0, so coincident points get a zero gradient without a division.
    """
    q = np.asarray(distances, dtype=np.float64) * (1.0 / support_radius)
    inner = q <= 0.5
    one_minus = np.clip(1.0 - q, 0.0, None)
    sigma = 8.0 / (np.pi * support_radius**3)
    w = np.where(inner, 6.0 * (q - 1.0) * q * q + 1.0, 2.0 * one_minus**3) * sigma
    scale = sigma / support_radius**2
    f = np.where(inner, 6.0 * (3.0 * q - 2.0), -6.0 * one_minus * one_minus / np.maximum(q, 0.5)) * scale
    return w, f
