"""The frames between two learned steps in `bench.learned_span`.

External checks:
- Cubic Hermite interpolation through both ends' values and first derivatives is exact for every
  polynomial of degree 3 or less (Burden & Faires, "Numerical Analysis", section 3.4 on Hermite
  interpolation; section number from memory). A particle in free flight follows
  x = x0 + v0 t + g t^2 / 2 (projectile motion, any mechanics textbook), a polynomial of degree 2,
  so its interpolated positions between two steps are its true positions.
- The error of cubic Hermite interpolation is f''''(xi) / 4! * (t - t0)^2 (t - t1)^2 (same source):
  for f(t) = t^4 on [0, 1] the error at the midpoint is exactly (1/2)^2 (1/2)^2 = 1/16.
"""

import numpy as np

from bench.learned_span import hermite, main


def test_free_flight_between_steps_is_exact():
    rng = np.random.default_rng(5)
    p0 = rng.normal(size=(50, 3))
    v0 = rng.normal(scale=3.0, size=(50, 3))
    g = np.array([0.0, 0.0, -9.81])
    h = 0.05  # a two-frame step at 40 fps
    p1, v1 = p0 + v0 * h + 0.5 * g * h**2, v0 + g * h
    for s in (0.25, 0.5, 0.75):
        t = s * h
        np.testing.assert_allclose(hermite(p0, v0, p1, v1, h, s), p0 + v0 * t + 0.5 * g * t**2, atol=1e-12)


def test_quartic_midpoint_error_is_the_textbook_bound():
    p0, v0, p1, v1 = np.array([0.0]), np.array([0.0]), np.array([1.0]), np.array([4.0])  # t^4 and 4 t^3 at 0 and 1
    assert abs((0.5**4 - hermite(p0, v0, p1, v1, 1.0, 0.5)[0]) - 1.0 / 16.0) < 1e-12


def test_bad_arguments_are_named(tmp_path, capsys):
    assert main(["--spans", "0", "--eval-dir", str(tmp_path), "--heldout", str(tmp_path)]) == 64
    assert "--spans 0" in capsys.readouterr().err
    assert main(["--eval-dir", str(tmp_path), "--heldout", str(tmp_path)]) == 64
    assert "run bench.eval_learned first" in capsys.readouterr().err
