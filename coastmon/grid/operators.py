"""Differential operators on any 2-D grid on the sphere, by Green's theorem on dual cells.

Every function takes arrays shaped ``(..., y, x)`` (leading axes such as time are carried
through) and a :class:`~coastmon.grid.metrics.GridMetrics`. A dual cell with a missing
(NaN) vertex gives NaN; point values average the valid dual cells around them, so a sea
point next to land still gets a value from its sea-side cells.
"""

from __future__ import annotations

import numpy as np

from coastmon.grid.metrics import GridMetrics, _to_points

_VERTS = (
    (slice(None, -1), slice(None, -1)),
    (slice(None, -1), slice(1, None)),
    (slice(1, None), slice(1, None)),
    (slice(1, None), slice(None, -1)),
)


def _dual_sum(q: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """sum_k weights[k] * q at vertex k, on the dual cells (..., y-1, x-1)."""
    out = weights[0] * q[..., _VERTS[0][0], _VERTS[0][1]]
    for k in range(1, 4):
        sy, sx = _VERTS[k]
        out = out + weights[k] * q[..., sy, sx]
    return out


def _cell_mean(q: np.ndarray) -> np.ndarray:
    """Mean of the four vertices of each dual cell."""
    out = q[..., _VERTS[0][0], _VERTS[0][1]]
    for k in range(1, 4):
        out = out + q[..., _VERTS[k][0], _VERTS[k][1]]
    return 0.25 * out


def _grad_dual(q: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Green's-theorem derivative with the cell mean removed (zero for a constant field)."""
    return _dual_sum(q, weights) - _cell_mean(q) * weights.sum(axis=0)


def gradient_dual(q: np.ndarray, metrics: GridMetrics) -> tuple[np.ndarray, np.ndarray]:
    r"""Eastward and northward derivatives of ``q`` on the dual cells (units of q per m).

    :math:`\partial q/\partial x = A^{-1}\oint (q-\bar q)\,dN`,
    :math:`\partial q/\partial y = -A^{-1}\oint (q-\bar q)\,dE` (Green's theorem,
    trapezoidal line integral). On the sphere the plain line integral of a scalar gives the
    divergence form :math:`(a\cos\varphi)^{-1}\partial(q\cos\varphi)/\partial\varphi`,
    which differs from the gradient by :math:`q\tan\varphi/a`; removing the cell mean
    :math:`\bar q` first makes the gradient of a constant exactly zero and keeps the
    estimate second-order accurate.
    """
    q = np.asarray(q, dtype=np.float64)
    return _grad_dual(q, metrics.gx), _grad_dual(q, metrics.gy)


def gradient(q: np.ndarray, metrics: GridMetrics) -> tuple[np.ndarray, np.ndarray]:
    """Eastward and northward derivatives of ``q`` at the grid points (see gradient_dual)."""
    qx, qy = gradient_dual(q, metrics)
    return _to_points(qx), _to_points(qy)


def vorticity_dual(u: np.ndarray, v: np.ndarray, metrics: GridMetrics) -> np.ndarray:
    r"""Relative vorticity on the dual cells: circulation divided by area (Stokes).

    .. math:: \zeta = \frac{1}{A}\oint (u\,dE + v\,dN)
              = \frac{\partial v}{\partial x} - \frac{\partial u}{\partial y}

    Exact for solid-body rotation on a regular lon/lat grid (gives the cell mean of
    :math:`2\omega\sin\varphi`; Vallis 2017, §2.2 on vorticity and circulation).
    """
    u = np.asarray(u, dtype=np.float64)
    v = np.asarray(v, dtype=np.float64)
    return _dual_sum(v, metrics.gx) - _dual_sum(u, metrics.gy)


def vorticity(u: np.ndarray, v: np.ndarray, metrics: GridMetrics) -> np.ndarray:
    """Relative vorticity (s-1) at the grid points; average of the surrounding dual cells."""
    return _to_points(vorticity_dual(u, v, metrics))


def divergence(u: np.ndarray, v: np.ndarray, metrics: GridMetrics) -> np.ndarray:
    r"""Horizontal divergence :math:`\partial u/\partial x + \partial v/\partial y` (s-1)."""
    u = np.asarray(u, dtype=np.float64)
    v = np.asarray(v, dtype=np.float64)
    return _to_points(_dual_sum(u, metrics.gx) + _dual_sum(v, metrics.gy))


def _strain_dual(u: np.ndarray, v: np.ndarray, metrics: GridMetrics
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Normal and shear strain on the dual cells, with the spherical metric terms."""
    # tan(lat)/a of each dual cell: minus the divergence-form northward derivative of a
    # constant, (a cos lat)^-1 d(cos lat)/d lat = -tan(lat)/a, which is the sum of the
    # northward weights (the same discrete operator, so a constant gives exactly 0).
    tan_over_a = -metrics.gy.sum(axis=0)
    sn = _grad_dual(u, metrics.gx) - _grad_dual(v, metrics.gy) - _cell_mean(v) * tan_over_a
    ss = _grad_dual(v, metrics.gx) + _grad_dual(u, metrics.gy) + _cell_mean(u) * tan_over_a
    return sn, ss


def strain(u: np.ndarray, v: np.ndarray, metrics: GridMetrics) -> tuple[np.ndarray, np.ndarray]:
    r"""Normal and shear strain (s-1) at the grid points, on the sphere.

    .. math::

        s_n = \frac{\partial u}{\partial x} - \frac{\partial v}{\partial y}
              - \frac{v\tan\varphi}{a},\qquad
        s_s = \frac{\partial v}{\partial x} + \frac{\partial u}{\partial y}
              + \frac{u\tan\varphi}{a}

    with u, v the eastward and northward components: the rate-of-strain tensor in
    spherical coordinates (Batchelor 1967, appendix 2, with colatitude
    :math:`\theta = \pi/2 - \varphi`). The metric terms make the strain of a
    solid-body rotation of the sphere, :math:`u = U\cos\varphi`, exactly zero; without
    them it would be :math:`U\sin\varphi/a`, a quarter of ζ² in W (small at the
    mesoscale, where the velocity gradients are much larger than u/a).
    """
    u = np.asarray(u, dtype=np.float64)
    v = np.asarray(v, dtype=np.float64)
    sn, ss = _strain_dual(u, v, metrics)
    return _to_points(sn), _to_points(ss)


def okubo_weiss(u: np.ndarray, v: np.ndarray, metrics: GridMetrics) -> np.ndarray:
    r"""Okubo–Weiss parameter :math:`W = s_n^2 + s_s^2 - \zeta^2` (s-2).

    Negative W marks rotation-dominated eddy cores (Okubo 1970; Weiss 1991). Computed on
    the dual cells (strain with its spherical metric terms as in :func:`strain`,
    vorticity from the circulation), then averaged to the points.
    """
    u = np.asarray(u, dtype=np.float64)
    v = np.asarray(v, dtype=np.float64)
    sn, ss = _strain_dual(u, v, metrics)
    zeta = vorticity_dual(u, v, metrics)
    return _to_points(sn**2 + ss**2 - zeta**2)


def rossby_number(zeta: np.ndarray, metrics: GridMetrics) -> np.ndarray:
    r"""Local Rossby number :math:`Ro = \zeta / f` (dimensionless)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray(zeta) / metrics.f


def geostrophic_velocity(
    ssh: np.ndarray, metrics: GridMetrics, g: float = 9.80665, equator_band_deg: float = 3.0
) -> tuple[np.ndarray, np.ndarray]:
    r"""Surface geostrophic velocity from sea surface height (m s-1).

    .. math:: u_g = -\frac{g}{f}\frac{\partial\eta}{\partial y},\qquad
              v_g = \frac{g}{f}\frac{\partial\eta}{\partial x}

    (Gill 1982 §7.6; Vallis 2017 §2.8). Within ``equator_band_deg`` of the equator, where
    f vanishes and the balance fails, the result is NaN.
    """
    ex, ey = gradient(ssh, metrics)
    near_eq = np.abs(metrics.lat) < equator_band_deg
    # f = 0 on the equator: g/f is infinite there (masked by the band anyway).
    with np.errstate(divide="ignore", invalid="ignore"):
        gf = g / metrics.f
        ug = np.where(near_eq, np.nan, -gf * ey)
        vg = np.where(near_eq, np.nan, gf * ex)
    return ug, vg
