"""Density relaxation after a learned step: Jacobi iterations of a position-based density constraint.

The learned step leaves the body of water with a noisy density (a few per
cent); a few cheap position corrections bring the compressed parts back
towards rest density before the hard constraints run. Published support for
doing this during a learned rollout: Toshev et al. 2024, "Neural SPH:
Improved Neural Modeling of Lagrangian Fluid Dynamics", ICML (SPH relaxation
sub-steps keep density near rho0 and cut rollout error). Our form is the
density constraint of Macklin & Mueller 2013, "Position Based Fluids", ACM
TOG 32(4), solved with Jacobi iterations on a fixed neighbour table.

Legend (all lengths in particle spacings d, so m / rho0 = 1 d^3):
    x_i          fluid positions; x_b boundary particles with volumes V_b (d^3)
    W, grad W    cubic spline of support H (engine.kernels), grad_i W_ij = f_ij (x_i - x_j)
    rho_i / rho0 = W(0) + sum_j W_ij + sum_b V_b W_ib    (Monaghan 1992; Akinci et al. 2012)
    C_i          = max(rho_i / rho0 - 1, 0)   (unilateral: only compression is corrected,
                   so the truncated free surface is not pulled together; common practice)
    lambda_i     = -C_i / (sum_j |grad_j C_i|^2 + |grad_i C_i|^2 + epsilon)
    dx_i         = sum_j (lambda_i + lambda_j) grad_i W_ij + lambda_i sum_b V_b grad_i W_ib

Boundary particles do not move and carry no lambda of their own; the fluid
particle takes the whole correction against them (from memory: the usual
Akinci-style coupling in position-based solvers).

The neighbour table is found once (the learned step's own) and reused by every
iteration, as in Macklin & Mueller's Algorithm 1; distances are recomputed each
iteration.
"""

from concurrent.futures import ThreadPoolExecutor

import numpy as np

from ..kernels import kernel

#: Constraint-force mixing of Macklin & Mueller 2013 (their epsilon), in the
#: units of |grad C|^2 (1/d^2). Typical interior denominators are ~0.2 here, so
#: this only matters for isolated particles with near-empty sums.
DEFAULT_EPSILON = 1e-3


def relax_density(positions, neighbour_index, neighbour_mask, boundary_positions=None,
                  boundary_volumes=None, boundary_index=None, boundary_mask=None, iterations=2,
                  support=2.0, epsilon=DEFAULT_EPSILON, boundary_rows=None, threads=1) -> np.ndarray:
    """Move particles to reduce SPH over-density (see the module docstring).

    Args:
        positions: (N, 3) float fluid positions in spacings d.
        neighbour_index: (N, K) int fluid neighbours, a symmetric table: j is in row i exactly
            when i is in row j (``features.fluid_neighbour_table`` with no row over its cap, or
            ``features.symmetric_table``); padding entries point at the particle itself.
        neighbour_mask: (N, K) float 1 for a real neighbour, 0 for padding.
        boundary_positions: optional (B, 3) float boundary particle positions in d.
        boundary_volumes: (B,) V_b / d^3.
        boundary_index: (N, Kb) int rows of the boundary arrays near each particle
            (``features.boundary_neighbour_table``), or (Nb, Kb) for the particles
            ``boundary_rows`` only.
        boundary_mask: (N, Kb) or (Nb, Kb) 1 for a real boundary neighbour.
        boundary_rows: optional (Nb,) int particles the boundary tables belong to (default all).
        iterations: Jacobi iterations (0 returns a copy of the input).
        support: kernel support H in d.
        epsilon: constraint-force mixing (1/d^2).
        threads: the fluid rows are split into this many blocks, each worked on in its own
            thread (numpy releases the GIL in its array loops); every row's arithmetic is the
            same whatever the count, so the result is too.

    Returns:
        (N, 3) float64 positions in d (a new array; the inputs are not changed).
    """
    x = np.array(positions, np.float64).reshape(-1, 3)
    n = len(x)
    if n == 0 or iterations <= 0:
        return x
    # Every pair term is evaluated from both of its rows on the dense table, so each sum over
    # neighbours is a row sum (no scatter); the terms are symmetric in W, f and r and
    # antisymmetric in x_i - x_j, so both rows see the same value. Pair arithmetic runs in
    # float32 about the centre (offsets good to ~1e-7 of the scene size, far below the
    # corrections); positions stay float64.
    index = np.asarray(neighbour_index)
    mask = np.asarray(neighbour_mask, np.float32)
    centre = x.mean(axis=0)
    use_boundary = boundary_positions is not None and np.size(boundary_positions) > 0
    if use_boundary:
        breal = np.asarray(boundary_mask) > 0
        owners = np.arange(n) if boundary_rows is None else np.asarray(boundary_rows, np.int64)
        brows = np.broadcast_to(owners[:, None], breal.shape)[breal]
        bcols = np.asarray(boundary_index)[breal]
        bpos = (np.asarray(boundary_positions, np.float64)[bcols] - centre).astype(np.float32)
        bvol = np.asarray(boundary_volumes, np.float64)[bcols].astype(np.float32)
    w0 = float(kernel(0.0, support))
    blocks = _row_blocks(n, threads)

    def row_sums(weights, columns) -> np.ndarray:
        """(rows, 3) float64: sum over each row of weights * columns[c], for c = 0, 1, 2."""
        return np.stack([np.einsum("nk,nk->n", weights, column) for column in columns], axis=1).astype(np.float64)

    def boundary_sum3(scale, offsets) -> np.ndarray:
        return np.stack([np.bincount(brows, scale * offsets[:, c], minlength=n) for c in range(3)], axis=1)

    def fluid_terms(rows, columns) -> tuple:
        """Offsets, (dW/dr)/r and the density, gradient and gradient-norm sums of a row block."""
        block = index[rows]
        offsets = [column[rows, None] - np.take(column, block) for column in columns]  # x_i - x_j, 3 x (n, K)
        r2 = offsets[0] * offsets[0]
        r2 += offsets[1] * offsets[1]
        r2 += offsets[2] * offsets[2]
        w, f = _kernel_terms32(r2, support)
        # Padding entries (j = i) have zero offsets, so they add nothing to the gradient sums;
        # only the density sum needs the mask.
        ratio = w0 + np.einsum("nk,nk->n", w, mask[rows]).astype(np.float64)
        grad_others = np.einsum("nk,nk->n", f * f, r2).astype(np.float64)  # sum_j |grad_j C_i|^2
        return offsets, f, ratio, row_sums(f, offsets), grad_others

    def fluid_step(rows, offsets, f, lam) -> np.ndarray:
        """sum_j (lambda_i + lambda_j) grad_i W_ij over a row block."""
        weights = np.take(lam, index[rows])
        weights += lam[rows, None]
        weights *= f
        return row_sums(weights, offsets)

    with _BlockRunner(len(blocks)) as run:
        for _ in range(int(iterations)):
            x32 = (x - centre).astype(np.float32)
            columns = x32.T.copy()
            parts = run(lambda rows: fluid_terms(rows, columns), blocks)
            ratio, grad_self, grad_others = (np.concatenate([part[k] for part in parts]) for k in (2, 3, 4))
            if use_boundary:
                boffsets = x32[brows] - bpos
                wb, fb = _kernel_terms32(np.einsum("pc,pc->p", boffsets, boffsets), support)
                ratio += np.bincount(brows, wb * bvol, minlength=n)
                fb *= bvol
                grad_self += boundary_sum3(fb, boffsets)
            constraint = np.maximum(ratio - 1.0, 0.0)
            lam = (-constraint / (grad_others + np.einsum("nc,nc->n", grad_self, grad_self) + epsilon)).astype(np.float32)
            step = np.concatenate(run(lambda rows, part: fluid_step(rows, part[0], part[1], lam), blocks, parts))
            if use_boundary:
                step += boundary_sum3(lam[brows] * fb, boffsets)
            x += step
    return x


#: Fewest rows worth a thread of their own: below it the pool's start and hand-offs cost more than the
#: rows (measured 2026-12-05, 5 iterations on a resting tank, 1 thread against 2: 672 rows 5.0 against
#: 10.6 ms, 2,964 rows 10.6 against 14.5 ms, 5,760 rows 21 against 45 ms with the other core busy).
MIN_BLOCK_ROWS = 8192


def _row_blocks(count, threads) -> list:
    """Contiguous slices of ``range(count)``, none empty: ``threads`` of them (at least 1), fewer where a
    block would hold under ``MIN_BLOCK_ROWS`` rows."""
    edges = np.linspace(0, count, max(1, min(int(threads), count // MIN_BLOCK_ROWS)) + 1).astype(int)
    return [slice(a, b) for a, b in zip(edges[:-1], edges[1:])]


class _BlockRunner:
    """``run(function, blocks, *per_block)``: ``function(block, *items)`` for every block, in a pool
    of threads when there is more than one block; the results in block order."""

    def __init__(self, count):
        self.pool = ThreadPoolExecutor(count) if count > 1 else None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        if self.pool is not None:
            self.pool.shutdown()

    def __call__(self, function, blocks, *per_block) -> list:
        if self.pool is None:
            return [function(*items) for items in zip(blocks, *per_block)]
        return list(self.pool.map(function, blocks, *per_block))


def _kernel_terms32(r2, support):
    """W and (dW/dr)/r of the cubic spline (engine.kernels.kernel_terms) in float32, for squared distances.

    ``r2`` float32 in d^2. Written as W = sigma (2 a^3 - 8 b^3) with a = max(1 - q, 0) and
    b = max(1/2 - q, 0), q = r / H (the same piecewise cubic as engine.kernels, without a
    branch), and (dW/dr)/r = sigma / H^2 (-6 a^2 / max(q, 1/2) - 12 q b), which is
    6 (3 q - 2) inside q <= 1/2 and -6 (1 - q)^2 / q outside, as there. Pairs beyond the
    support get W = 0 and no gradient; r = 0 takes the inner branch (finite).
    """
    q = np.sqrt(r2)
    q *= np.float32(1.0 / support)
    a = np.float32(1.0) - q
    np.maximum(a, np.float32(0.0), out=a)
    b = np.float32(0.5) - q
    np.maximum(b, np.float32(0.0), out=b)
    a2, b2 = a * a, b * b
    sigma = np.float32(8.0 / (np.pi * support**3))
    w = a2 * a
    w *= np.float32(2.0) * sigma
    w -= (np.float32(8.0) * sigma) * (b2 * b)
    f = q * b
    f *= np.float32(-12.0)
    np.maximum(q, np.float32(0.5), out=q)
    a2 *= np.float32(6.0)
    a2 /= q
    f -= a2
    f *= sigma / np.float32(support**2)
    return w, f
