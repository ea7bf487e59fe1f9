"""Edge models: the latent-type kernel g(u, v) that decides who is linked to whom.

Units draw latent types u ~ Uniform(0, 1); an edge between i and j forms with
probability min(1, rho_n * g(u_i, u_j)) (METHODS.md §0).  Two kinds of g:

* ``BlockModel``: a stochastic block model, g piecewise constant on intervals
  whose lengths are the block shares.
* ``KernelModel``: a smooth graphon from a built-in family or a whitelisted
  arithmetic expression in ``u`` and ``v``.

Every model is normalised so that the double integral of g is 1, which makes
the mean degree (n - 1) * rho_n before clipping.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from designcalc.errors import ModelError
from designcalc.surveyed import SurveyedNetwork
from designcalc.expression import Expression, compile_expression

__all__ = [
    "BlockModel",
    "KernelModel",
    "EdgeModel",
    "KERNEL_FAMILIES",
    "kernel_quadrature",
]

#: Built-in smooth kernel families and the parameters each one takes.
KERNEL_FAMILIES: dict[str, tuple[str, ...]] = {
    "degree_gradient": ("degree_ratio",),
    "distance_decay": ("length_scale", "floor"),
    "cosine": ("amplitudes",),
    "expression": ("expression",),
}

# Composite Gauss-Legendre rule: many panels so kinks (|u - v|, min, max)
# cost little accuracy.
_PANELS = 64
_POINTS_PER_PANEL = 6
_CHECK_GRID = 121


def kernel_quadrature(
    panels: int = _PANELS, points: int = _POINTS_PER_PANEL
) -> tuple[np.ndarray, np.ndarray]:
    """Nodes and weights of a composite Gauss-Legendre rule on [0, 1]."""
    x, w = np.polynomial.legendre.leggauss(points)
    edges = np.linspace(0.0, 1.0, panels + 1)
    half = np.diff(edges) / 2
    mid = (edges[:-1] + edges[1:]) / 2
    nodes = (mid[:, None] + half[:, None] * x[None, :]).ravel()
    weights = (half[:, None] * w[None, :]).ravel()
    return nodes, weights


@dataclass(frozen=True)
class BlockModel:
    """Stochastic block model (Holland, Laskey & Leinhardt 1983).

    Parameters
    ----------
    shares
        Share of units in each block; positive, summing to 1.
    affinity
        Symmetric non-negative K x K matrix of relative link propensities.
        Only ratios matter: the matrix is rescaled so that the kernel
        integrates to 1 and the density rule sets the level.
    """

    shares: tuple[float, ...]
    affinity: tuple[tuple[float, ...], ...]
    kind: str = field(default="blocks", init=False)

    def __post_init__(self) -> None:
        s = np.asarray(self.shares, dtype=float)
        b = np.asarray(self.affinity, dtype=float)
        k = s.size
        if k < 1 or np.any(~np.isfinite(s)) or np.any(s <= 0):
            raise ModelError(f"block shares must be positive numbers; got {list(self.shares)}")
        if abs(s.sum() - 1.0) > 1e-6:
            raise ModelError(f"block shares must sum to 1; they sum to {s.sum():.6g}")
        if b.shape != (k, k):
            raise ModelError(f"the affinity matrix must be {k} x {k} (one row per block); got shape {b.shape}")
        if np.any(~np.isfinite(b)) or np.any(b < 0):
            raise ModelError("affinity entries must be finite and non-negative")
        if not np.allclose(b, b.T, rtol=0, atol=1e-12 * max(1.0, np.abs(b).max())):
            i, j = np.argwhere(~np.isclose(b, b.T, rtol=0, atol=1e-12))[0]
            raise ModelError(
                f"the affinity matrix must be symmetric; entry [{i}][{j}] = {b[i, j]:g} "
                f"but [{j}][{i}] = {b[j, i]:g}"
            )
        if s @ b @ s <= 0:
            raise ModelError("the affinity matrix is all zero: no edges could ever form")

    @property
    def n_blocks(self) -> int:
        return len(self.shares)

    def normalised_matrix(self) -> np.ndarray:
        """The block values of g, scaled so that sum_kl s_k s_l g_kl = 1 (exact)."""
        s = np.asarray(self.shares)
        b = np.asarray(self.affinity, dtype=float)
        return b / (s @ b @ s)

    def boundaries(self) -> np.ndarray:
        """Cut points of [0, 1] between blocks (length K + 1)."""
        cuts = np.concatenate([[0.0], np.cumsum(self.shares)])
        cuts[-1] = 1.0
        return cuts

    def block_of(self, types: np.ndarray) -> np.ndarray:
        """Block index of each latent type."""
        inner = self.boundaries()[1:-1]
        return np.searchsorted(inner, np.asarray(types), side="right")

    def kernel(self, u: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Normalised g evaluated at paired arrays of types."""
        return self.normalised_matrix()[self.block_of(u), self.block_of(v)]

    def degree_function(self, u: np.ndarray) -> np.ndarray:
        """d(u) = integral of g(u, v) dv (exact for blocks)."""
        d = self.normalised_matrix() @ np.asarray(self.shares)
        return d[self.block_of(u)]

    def max_value(self) -> float:
        return float(self.normalised_matrix().max())

    def expected_mean_degree(self, n_units: int, rho: float) -> float:
        """(n - 1) * sum_kl s_k s_l min(1, rho g_kl): exact for iid block labels."""
        s = np.asarray(self.shares)
        p = np.minimum(1.0, rho * self.normalised_matrix())
        return float((n_units - 1) * (s @ p @ s))

    def expected_adjacency_eigenvalues(self, n_units: int, rho: float) -> np.ndarray:
        """Eigenvalues of the expected adjacency n * S^1/2 P S^1/2 (largest |.| first)."""
        s = np.sqrt(np.asarray(self.shares))
        p = np.minimum(1.0, rho * self.normalised_matrix())
        eig = np.linalg.eigvalsh(n_units * (s[:, None] * p * s[None, :]))
        return eig[np.argsort(-np.abs(eig))]

    def describe(self) -> str:
        return f"stochastic block model with {self.n_blocks} blocks (shares {', '.join(f'{x:g}' for x in self.shares)})"


@dataclass(frozen=True)
class KernelModel:
    """A smooth graphon kernel, normalised to integrate to 1.

    Families (raw, before normalisation):

    * ``degree_gradient``: r**u * r**v, so expected degree rises smoothly with
      type and the most connected type has ``degree_ratio`` times the degree
      of the least connected (a rank-one, product form).
    * ``distance_decay``: floor + exp(-|u - v| / length_scale): units link
      mostly to similar types (homophily along one latent dimension).
    * ``cosine``: 1 + sum_k a_k cos(2 pi k u) cos(2 pi k v), a rank-few form;
      non-negative when sum_k |a_k| <= 1.
    * ``expression``: any whitelisted arithmetic expression in u and v.
    """

    family: str
    degree_ratio: float = 1.0
    length_scale: float = 0.1
    floor: float = 0.0
    amplitudes: tuple[float, ...] = ()
    expression: str = ""
    kind: str = field(default="kernel", init=False)
    _raw: Callable[[np.ndarray, np.ndarray], np.ndarray] = field(init=False, repr=False, compare=False)
    _scale: float = field(init=False, repr=False, compare=False)

    def __reduce__(self) -> tuple[type, tuple[object, ...]]:
        # The compiled kernel (_raw) is a closure, which pickle cannot send; send the stated
        # fields and rebuild it, so spawn-started worker pools and plain pickle work.
        return (KernelModel, (self.family, self.degree_ratio, self.length_scale, self.floor, self.amplitudes, self.expression))

    def __post_init__(self) -> None:
        if self.family not in KERNEL_FAMILIES:
            raise ModelError(f"unknown kernel family {self.family!r}; choose one of {sorted(KERNEL_FAMILIES)}")
        raw = self._build_raw()
        object.__setattr__(self, "_raw", raw)
        grid = np.linspace(0.0, 1.0, _CHECK_GRID)
        uu, vv = np.meshgrid(grid, grid, indexing="ij")
        with np.errstate(all="ignore"):
            values = np.asarray(raw(uu, vv), dtype=float) * np.ones_like(uu)
            swapped = np.asarray(raw(vv, uu), dtype=float) * np.ones_like(uu)
        if not np.all(np.isfinite(values)):
            bad = np.argwhere(~np.isfinite(values))[0]
            raise ModelError(
                f"the kernel is not finite at u = {grid[bad[0]]:.3g}, v = {grid[bad[1]]:.3g}"
            )
        if values.min() < -1e-12 * max(1.0, np.abs(values).max()):
            bad = np.unravel_index(np.argmin(values), values.shape)
            raise ModelError(
                f"the kernel must be non-negative; it is {values[bad]:.4g} at "
                f"u = {grid[bad[0]]:.3g}, v = {grid[bad[1]]:.3g}"
            )
        asym = np.abs(values - swapped)
        if asym.max() > 1e-9 * max(1.0, np.abs(values).max()):
            bad = np.unravel_index(np.argmax(asym), asym.shape)
            raise ModelError(
                f"the kernel must be symmetric, g(u, v) = g(v, u); at u = {grid[bad[0]]:.3g}, "
                f"v = {grid[bad[1]]:.3g} it is {values[bad]:.4g} one way and {swapped[bad]:.4g} the other"
            )
        nodes, weights = kernel_quadrature()
        uq, vq = np.meshgrid(nodes, nodes, indexing="ij")
        with np.errstate(all="ignore"):
            integral = float(weights @ (np.maximum(raw(uq, vq) * np.ones_like(uq), 0.0)) @ weights)
        if not np.isfinite(integral) or integral <= 0:
            raise ModelError("the kernel integrates to zero: no edges could ever form")
        # The tensor Gauss-Legendre rule cannot resolve the diagonal kink of
        # exp(-|u - v| / l) for short length scales (67% off at l = 0.001), so
        # the built-in families use their exact double integrals.
        closed = self._closed_form_integral()
        object.__setattr__(self, "_scale", integral if closed is None else closed)

    def _closed_form_integral(self) -> float | None:
        """Exact double integral of the raw kernel for the built-in families (None for expressions)."""
        if self.family == "degree_gradient":
            # (int_0^1 r^u du)^2 = ((r - 1) / ln r)^2, and 1 at r = 1.
            log_r = float(np.log(self.degree_ratio))
            return 1.0 if log_r == 0 else float(np.expm1(log_r) / log_r) ** 2
        if self.family == "distance_decay":
            # int int exp(-|u - v| / l) du dv = 2 l - 2 l^2 (1 - exp(-1 / l)).
            ell = float(self.length_scale)
            return float(self.floor + 2 * ell + 2 * ell**2 * np.expm1(-1 / ell))
        if self.family == "cosine":
            # Every cosine term integrates to zero over [0, 1].
            return 1.0
        return None

    def _build_raw(self) -> Callable[[np.ndarray, np.ndarray], np.ndarray]:
        if self.family == "degree_gradient":
            r = float(self.degree_ratio)
            if not np.isfinite(r) or r < 1:
                raise ModelError(f"degree_ratio must be a number >= 1; got {r}")
            log_r = np.log(r)
            return lambda u, v: np.exp(log_r * (np.asarray(u) + np.asarray(v)))
        if self.family == "distance_decay":
            ell, floor = float(self.length_scale), float(self.floor)
            if not np.isfinite(ell) or ell <= 0:
                raise ModelError(f"length_scale must be a positive number; got {ell}")
            if not np.isfinite(floor) or floor < 0:
                raise ModelError(f"floor must be a non-negative number; got {floor}")
            return lambda u, v: floor + np.exp(-np.abs(np.asarray(u) - np.asarray(v)) / ell)
        if self.family == "cosine":
            a = np.asarray(self.amplitudes, dtype=float)
            if a.size == 0 or not np.all(np.isfinite(a)):
                raise ModelError("amplitudes must be a non-empty list of numbers")
            if np.abs(a).sum() > 1 + 1e-12:
                raise ModelError(
                    f"cosine amplitudes must have absolute values summing to at most 1 "
                    f"(else the kernel turns negative); they sum to {np.abs(a).sum():.4g}"
                )
            freq = 2 * np.pi * np.arange(1, a.size + 1)

            def cosine(u: np.ndarray, v: np.ndarray) -> np.ndarray:
                u, v = np.asarray(u, dtype=float), np.asarray(v, dtype=float)
                total = np.ones(np.broadcast(u, v).shape)
                for amp, f in zip(a, freq):
                    total = total + amp * np.cos(f * u) * np.cos(f * v)
                return total

            return cosine
        compiled: Expression = compile_expression(self.expression, variables=("u", "v"))
        return lambda u, v: compiled(u=np.asarray(u, dtype=float), v=np.asarray(v, dtype=float))

    def kernel(self, u: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Normalised g evaluated at paired arrays of types."""
        u, v = np.asarray(u, dtype=float), np.asarray(v, dtype=float)
        with np.errstate(all="ignore"):
            return np.maximum(self._raw(u, v) * np.ones(np.broadcast(u, v).shape), 0.0) / self._scale

    def degree_function(self, u: np.ndarray) -> np.ndarray:
        """d(u) = integral of g(u, v) dv by Gauss-Legendre quadrature."""
        nodes, weights = kernel_quadrature()
        u = np.atleast_1d(np.asarray(u, dtype=float))
        return self.kernel(u[:, None], nodes[None, :]) @ weights

    def max_value(self) -> float:
        grid = np.linspace(0.0, 1.0, 4 * _CHECK_GRID + 1)
        return float(self.kernel(grid[:, None], grid[None, :]).max())

    def expected_mean_degree(self, n_units: int, rho: float) -> float:
        """(n - 1) * double integral of min(1, rho g) by quadrature."""
        nodes, weights = kernel_quadrature()
        p = np.minimum(1.0, rho * self.kernel(nodes[:, None], nodes[None, :]))
        return float((n_units - 1) * (weights @ p @ weights))

    def expected_adjacency_eigenvalues(self, n_units: int, rho: float, count: int = 8) -> np.ndarray:
        """Leading eigenvalues of the expected adjacency, n times those of the integral operator."""
        nodes, weights = kernel_quadrature(panels=40, points=5)
        p = np.minimum(1.0, rho * self.kernel(nodes[:, None], nodes[None, :]))
        root = np.sqrt(weights)
        eig = np.linalg.eigvalsh(root[:, None] * p * root[None, :]) * n_units
        return eig[np.argsort(-np.abs(eig))][:count]

    def cell_bounds(self, n_cells: int) -> np.ndarray:
        """Upper bounds of the normalised g on an n_cells x n_cells grid of [0, 1]^2.

        The maximum over a fine sub-grid of each cell plus the largest step
        between neighbouring sub-grid points: a safe bound for kernels that do
        not spike between sub-grid points.  The sampler checks every candidate
        against its bound and refuses to continue if one is exceeded.
        """
        sub = 9
        pts = np.linspace(0.0, 1.0, n_cells * (sub - 1) + 1)
        values = self.kernel(pts[:, None], pts[None, :])
        step = max(
            float(np.abs(np.diff(values, axis=0)).max(initial=0.0)),
            float(np.abs(np.diff(values, axis=1)).max(initial=0.0)),
        )
        bounds = np.empty((n_cells, n_cells))
        for a in range(n_cells):
            rows = values[a * (sub - 1) : (a + 1) * (sub - 1) + 1]
            for b in range(n_cells):
                bounds[a, b] = rows[:, b * (sub - 1) : (b + 1) * (sub - 1) + 1].max()
        bounds = bounds + step
        return np.maximum(bounds, bounds.T)

    def describe(self) -> str:
        detail = {
            "degree_gradient": f"degree ratio {self.degree_ratio:g}",
            "distance_decay": f"length scale {self.length_scale:g}, floor {self.floor:g}",
            "cosine": f"amplitudes {', '.join(f'{a:g}' for a in self.amplitudes)}",
            "expression": f"g(u, v) proportional to {self.expression}",
        }[self.family]
        return f"smooth kernel '{self.family}' ({detail})"


# A surveyed network (designcalc.surveyed) stands where an edge model would: the graph itself, held fixed.
EdgeModel = BlockModel | KernelModel | SurveyedNetwork
