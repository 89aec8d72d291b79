"""Equivalent sources: harmonic gridding of scalar potential-field data.

A harmonic field observed above its sources is represented by a layer of point sources whose
field (the Green's function of the Laplacian, ``1/r``) is fitted to the data by damped least
squares; the fitted layer then predicts the field anywhere above it: on a grid at constant
height, on a drape surface, at another height (upward continuation) or back at the readings
(Dampney 1969; Cordell 1992).

Two solvers share one objective and one damping convention:

``"dense"``
    One source beneath each datum (or each block-averaged position) at a constant relative depth
    (Cordell 1992; block-averaged sources of Soler and Uieda 2021); the Jacobian is built in full
    and the damped normal equations are solved directly. For small problems (a few thousand
    data), e.g. ground gravity stations.
``"fft"``
    One source per occupied node of a regular lattice: the convolutional equivalent layer of
    Takahashi, Oliveira and Barbosa (2020), generalised to data at scattered positions and
    heights and to sources that follow the survey's drape. By default (``depth_type=
    "relative"``) each source sits ``depth`` below the median height of the data in its cell,
    capped at half the depth below the lowest datum nearby, so the layer keeps one depth
    beneath a draped survey (Cordell 1992 places each source a fixed depth below its datum);
    ``"constant"`` puts all sources on one horizontal plane ``depth`` below the median data
    height. The lattice-to-lattice part of the Jacobian is block-Toeplitz with Toeplitz blocks
    between a few horizontal source planes and data height levels (sources are spread over the
    planes by Lagrange weights in height) and is applied with real FFTs in double precision;
    the data are reached from the levels by Lagrange interpolation (horizontal and vertical),
    and the near field of every datum is replaced by the exact kernel of each source (a
    pre-corrected FFT, Phillips and White 1997, IEEE Trans. CAD 16:1059); the FFT kernel is
    zero at the adjacent nodes, which only the exact near field reaches. The lattice spacing
    follows the depth (``max(block, depth / 4)``, Dampney 1969). The damped least-squares
    problem is solved matrix-free by conjugate gradients on the normal equations (CGLS;
    Hestenes and Stiefel 1952, J. Res. NBS 49:409; Paige and Saunders 1982, ACM TOMS 8:43),
    preconditioned by overlapping additive Schwarz on windows of ~300 sources widened by 3 nodes
    (exact local normal matrices, Cholesky-factored once per damping; Smith, Bjorstad and Gropp 1996,
    Domain Decomposition, Cambridge). Cost per iteration O(G log G + N) for G lattice nodes
    and N data; memory O(N + 300 S) for S sources.

The objective, with weights normalised to mean 1 and the dimensionless kernel ``depth / r`` (so
the coefficients carry the data's unit and the damping is scale-free)::

    sum_i w_i (d_i - sum_j c_j depth / r_ij)^2 + damping * sum_j c_j^2

References
----------
Dampney, C. N. G. (1969). The equivalent source technique. Geophysics, 34(1), 39-53.
Cordell, L. (1992). A scattered equivalent-source method for interpolation and gridding of
potential-field data in three dimensions. Geophysics, 57(4), 629-636.
Soler, S. R., and Uieda, L. (2021). Gradient-boosted equivalent sources. Geophysical Journal
International, 227(3), 1768-1783.
Takahashi, D., Oliveira, V. C., Jr., and Barbosa, V. C. F. (2020). Convolutional equivalent

Modules (one concept each): ``kernels`` (numba kernels and the holders that feed them),
``lattice`` (lattice layout, height levels, source heights, FFT operator), ``precondition``
(additive Schwarz preconditioner), ``solve`` (dense and lattice solvers, CGLS,
:func:`fit_equivalent_sources`), ``crossval`` (blocked cross-validation), ``model`` (the fitted
model, save/load).
"""

from __future__ import annotations

from ..._numerics import block_median, median_spacing
from .crossval import cross_validate
from .lattice import layer_ceiling, source_heights, source_spacing
from .model import DIRECT_LIMIT, EquivalentSourceModel, load_model, save_model
from .solve import DENSE_LIMIT, fit_equivalent_sources, solver_method

__all__ = [
    "DENSE_LIMIT",
    "DIRECT_LIMIT",
    "EquivalentSourceModel",
    "block_median",
    "cross_validate",
    "fit_equivalent_sources",
    "layer_ceiling",
    "load_model",
    "median_spacing",
    "save_model",
    "source_heights",
    "solver_method",
    "source_spacing",
]
