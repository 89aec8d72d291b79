"""Additive Schwarz preconditioner of the lattice solver's damped normal equations.

The lattice is cut into square tiles of about PRECOND_SOURCES sources; each window holds a
tile's sources and those within PRECOND_OVERLAP nodes of it, and its normal matrix
``J^T W J + damping I`` (exact kernel, the data within PRECOND_MARGIN nodes of the window) is
factored once (Cholesky; Smith, Bjorstad and Gropp 1996, Domain Decomposition, Cambridge UP,
ch. 1). The tuning constants were chosen by measurement on the 1e6-reading demo; the figures
are in DEVELOPERS.md ("Equivalent sources: measured choices").
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import scipy.linalg

from ..._numerics import normal_matrix
from .kernels import _dense_jacobian, _schwarz_apply

if TYPE_CHECKING:
    from .solve import LatticeProblem

#: Sources per preconditioner tile.
PRECOND_SOURCES = 300
#: Nodes by which every window is widened on each side (overlap between windows).
PRECOND_OVERLAP = 3
#: Data within this many nodes of a window enter its local normal matrix.
PRECOND_MARGIN = 32
#: Beyond this many nodes from the tile only every PRECOND_FAR_STRIDE-th datum enters (its
#: weight multiplied by the stride: the far rows add smooth, small terms).
PRECOND_FULL = 8
PRECOND_FAR_STRIDE = 4


class NodeIndex:
    """Items (sources or data) by lattice node, to list those in a box of nodes quickly."""

    def __init__(self, flat: np.ndarray, nx: int) -> None:
        self.order = np.argsort(flat, kind="stable")
        self.keys = np.asarray(flat)[self.order]
        self.nx = int(nx)

    def within(self, x0: int, x1: int, y0: int, y1: int) -> np.ndarray:
        """Indices of the items whose node column is in [x0, x1] and row in [y0, y1]."""
        x0, x1 = max(int(x0), 0), min(int(x1), self.nx - 1)
        rows = np.arange(max(int(y0), 0), int(y1) + 1)
        lo = np.searchsorted(self.keys, rows * self.nx + x0)
        hi = np.searchsorted(self.keys, rows * self.nx + x1, side="right")
        if rows.size == 0 or x1 < x0:
            return np.empty(0, dtype=np.int64)
        return self.order[np.concatenate([np.arange(a, b) for a, b in zip(lo, hi)])]


class Schwarz:
    """Additive Schwarz preconditioner ``sum_i R_i^T M_i^-1 R_i`` from the windows' normal
    matrices ``[(sources, J^T W J), ...]`` and a damping: the Cholesky factors of ``M_i = J^T W
    J + damping I`` are packed (lower triangles by rows) in one array and applied by a parallel
    numba kernel, about 40 % faster than a LAPACK solve per window (memory-bound: one pass over
    the packed triangles each way). Substitution, not explicit inverses: at small dampings the
    windows are ill-conditioned and an explicit inverse cost 20 % more iterations. Symmetric
    positive definite, as conjugate gradients need."""

    def __init__(
        self, normals: list[tuple[np.ndarray, np.ndarray]], damping: float, n_sources: int, chunks: int
    ) -> None:
        sizes = np.array([src.size for src, _ in normals], dtype=np.int64)
        self.src_off = np.concatenate([[0], np.cumsum(sizes)])
        self.fac_off = np.concatenate([[0], np.cumsum(sizes * (sizes + 1) // 2)])
        self.src = np.concatenate([src for src, _ in normals]).astype(np.int64)
        self.fac = np.empty(int(self.fac_off[-1]))
        self.n_sources, self.chunks = int(n_sources), int(chunks)
        for k, (src, normal) in enumerate(normals):
            shifted = normal.copy()
            shifted[np.diag_indices_from(shifted)] += max(
                float(damping), 1e-12 * (float(np.trace(normal)) / max(src.size, 1) + 1.0)
            )
            factor = scipy.linalg.cholesky(shifted, lower=True, check_finite=False)
            self.fac[self.fac_off[k] : self.fac_off[k + 1]] = factor[np.tril_indices(src.size)]

    @property
    def windows(self) -> list[np.ndarray]:
        """Source indices of every window."""
        return [self.src[a:b] for a, b in zip(self.src_off[:-1], self.src_off[1:])]

    def apply(self, s: np.ndarray) -> np.ndarray:
        buffers = np.empty((self.chunks, self.n_sources))
        _schwarz_apply(
            np.ascontiguousarray(s, dtype=float), self.src, self.src_off, self.fac, self.fac_off, buffers
        )
        return buffers.sum(axis=0)


def local_normals(problem: LatticeProblem) -> list[tuple[np.ndarray, np.ndarray]]:
    """``(source indices, J^T W J)`` of every preconditioner window of a
    :class:`~potfield.fields.harmonic.eqsources.solve.LatticeProblem` (its lattice, source
    nodes and heights, data nodes, positions and square-root weights)."""
    self = problem
    lat = self.lattice
    iy, ix = np.divmod(self.node_index, lat.nx)
    se, sn, su = lat.x0 + ix * lat.dx, lat.y0 + iy * lat.dx, self.src_z
    width = max(
        4, int(round(np.sqrt(PRECOND_SOURCES * np.ptp(ix + 1) * np.ptp(iy + 1) / max(self.n_sources, 1))))
    )
    sources = NodeIndex(self.node_index, lat.nx)  # node_index is sorted: rows, then columns
    diy, dix = np.divmod(self.data_node, lat.nx)
    data_nodes = NodeIndex(self.data_node, lat.nx)
    over, margin = PRECOND_OVERLAP, PRECOND_OVERLAP + PRECOND_MARGIN
    full = PRECOND_OVERLAP + PRECOND_FULL
    blocks = []
    for ty in range(int(iy.min()), int(iy.max()) + 1, width):  # one factorisation per window
        for tx in range(int(ix.min()), int(ix.max()) + 1, width):
            if sources.within(tx, tx + width - 1, ty, ty + width - 1).size == 0:
                continue
            src = sources.within(tx - over, tx + width - 1 + over, ty - over, ty + width - 1 + over)
            data = data_nodes.within(
                tx - margin, tx + width - 1 + margin, ty - margin, ty + width - 1 + margin
            )
            # beyond PRECOND_FULL nodes only every PRECOND_FAR_STRIDE-th datum, its weight
            # multiplied by the stride (the far rows add smooth, small terms)
            far = (
                (dix[data] < tx - full)
                | (dix[data] > tx + width - 1 + full)
                | (diy[data] < ty - full)
                | (diy[data] > ty + width - 1 + full)
            )
            keep = ~far
            keep[np.flatnonzero(far)[::PRECOND_FAR_STRIDE]] = True
            data = data[keep]
            jac = np.empty((data.size, src.size))
            _dense_jacobian(
                self.e[data], self.n[data], self.u[data], se[src], sn[src], su[src], self.scale, jac
            )
            jac *= (self.sw[data] * np.where(far[keep], np.sqrt(PRECOND_FAR_STRIDE), 1.0))[:, None]
            blocks.append((src, normal_matrix(jac)))
    return blocks
