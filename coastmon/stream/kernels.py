"""Compiled kernels of the streaming pass (numba).

The per-chunk work on a ``(time, y, x)`` block is done by four kernels:

* :func:`dual_fields` — relative vorticity and the Okubo–Weiss eddy-core flag at the grid
  points, with the same Green's-theorem arithmetic as :mod:`coastmon.grid.operators`
  (dual-cell circulation, then the mean of the valid dual cells around each point);
* :func:`chunk_moments` — count, means, second and third central co-moments per point
  for a subset of the chunk's time steps (two passes over time, rows in parallel);
* :func:`merge_moments` — the pairwise combination of two sets of moments
  (Chan, Golub & LeVeque 1983; Pébay 2008 for third order), in place;
* :func:`sample_rows` — a CSR sparse-matrix product that ignores missing inputs and
  renormalises each row's weights over the finite ones.

All kernels release the GIL (``nogil``) so that several chunks can be processed by
different threads at once; the number of threads each kernel uses inside is set by the
caller with :func:`numba.set_num_threads` (a per-thread setting). Compiled code is cached
on disk when the package directory (or ``NUMBA_CACHE_DIR``) is writable, and compiled in
memory on first use otherwise.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

PAIR_INDEX = np.array(
    [[0, 1, 3, 6], [1, 2, 4, 7], [3, 4, 5, 8], [6, 7, 8, 9]], dtype=np.int64
)
"""Index of the co-moment of variables (a, b) in the packed triangle (symmetric):
``max(a, b) (max(a, b) + 1) / 2 + min(a, b)``, so the pairs of the first three variables
(u, v, ζ) fill indices 0–5 and those involving ssh follow."""

TRIPLES = np.array([[0, 0, 0], [0, 1, 1], [0, 0, 1], [1, 1, 1]], dtype=np.int64)
"""Variable indices of the third-order co-moments kept: uuu, uvv, uuv, vvv."""


def _compile(parallel: bool):
    """``njit`` with on-disk caching, or in-memory compilation if no cache is writable."""

    def wrap(func):
        options = {"parallel": parallel, "nogil": True, "fastmath": False}
        try:
            return njit(cache=True, **options)(func)
        except RuntimeError:
            return njit(cache=False, **options)(func)

    return wrap


@njit(nogil=True, inline="always")
def _cell_to_point(zd, wd, t, j, i, ny, nx):  # pragma: no cover - compiled
    # Same order as grid.metrics._to_points: the cell having this point as its vertex
    # 0, then 1, 2, 3; invalid cells add exactly 0.
    zt = 0.0
    wt = 0.0
    c = 0.0
    if j < ny - 1 and i < nx - 1 and np.isfinite(zd[t, j, i]):
        zt += zd[t, j, i]
        wt += wd[t, j, i]
        c += 1.0
    if j < ny - 1 and i > 0 and np.isfinite(zd[t, j, i - 1]):
        zt += zd[t, j, i - 1]
        wt += wd[t, j, i - 1]
        c += 1.0
    if j > 0 and i > 0 and np.isfinite(zd[t, j - 1, i - 1]):
        zt += zd[t, j - 1, i - 1]
        wt += wd[t, j - 1, i - 1]
        c += 1.0
    if j > 0 and i < nx - 1 and np.isfinite(zd[t, j - 1, i]):
        zt += zd[t, j - 1, i]
        wt += wd[t, j - 1, i]
        c += 1.0
    if c > 0:
        return zt / c, wt / c
    return np.nan, np.nan


@_compile(parallel=True)
def _dual_fields(u, v, gx, gy, ow_threshold, zeta, core, zd, wd, wp):  # pragma: no cover
    nt, ny, nx = u.shape
    # 1. Dual cells, row by row; a row's 16 weight vectors stay in cache over all t.
    for j in prange(ny - 1):
        for t in range(nt):
            for i in range(nx - 1):
                u0 = np.float64(u[t, j, i])
                u1 = np.float64(u[t, j, i + 1])
                u2 = np.float64(u[t, j + 1, i + 1])
                u3 = np.float64(u[t, j + 1, i])
                v0 = np.float64(v[t, j, i])
                v1 = np.float64(v[t, j, i + 1])
                v2 = np.float64(v[t, j + 1, i + 1])
                v3 = np.float64(v[t, j + 1, i])
                ux = gx[0, j, i] * u0
                ux = ux + gx[1, j, i] * u1
                ux = ux + gx[2, j, i] * u2
                ux = ux + gx[3, j, i] * u3
                uy = gy[0, j, i] * u0
                uy = uy + gy[1, j, i] * u1
                uy = uy + gy[2, j, i] * u2
                uy = uy + gy[3, j, i] * u3
                vx = gx[0, j, i] * v0
                vx = vx + gx[1, j, i] * v1
                vx = vx + gx[2, j, i] * v2
                vx = vx + gx[3, j, i] * v3
                vy = gy[0, j, i] * v0
                vy = vy + gy[1, j, i] * v1
                vy = vy + gy[2, j, i] * v2
                vy = vy + gy[3, j, i] * v3
                z = vx - uy
                zd[t, j, i] = z
                # Strain uses derivatives with the cell mean removed, as
                # coastmon.grid.operators.gradient_dual does; vorticity is the circulation.
                mu = 0.25 * (((u0 + u1) + u2) + u3)
                mv = 0.25 * (((v0 + v1) + v2) + v3)
                sgx = ((gx[0, j, i] + gx[1, j, i]) + gx[2, j, i]) + gx[3, j, i]
                sgy = ((gy[0, j, i] + gy[1, j, i]) + gy[2, j, i]) + gy[3, j, i]
                ux = ux - mu * sgx
                uy = uy - mu * sgy
                vx = vx - mv * sgx
                vy = vy - mv * sgy
                wd[t, j, i] = (ux - vy) ** 2 + (vx + uy) ** 2 - z**2
    # 2. Points: mean of the valid dual cells around each point; row sums of W per t.
    rsum = np.zeros((ny, nt))
    rcnt = np.zeros((ny, nt))
    for j in prange(ny):
        interior = 0 < j < ny - 1
        for t in range(nt):
            acc = 0.0
            cnt = 0.0
            for i in range(nx):
                if interior and 0 < i < nx - 1:
                    a = zd[t, j, i]
                    b = zd[t, j, i - 1]
                    c = zd[t, j - 1, i - 1]
                    d = zd[t, j - 1, i]
                    fa = np.isfinite(a)
                    fb = np.isfinite(b)
                    fc = np.isfinite(c)
                    fd = np.isfinite(d)
                    zt = 0.0
                    zt += a if fa else 0.0
                    zt += b if fb else 0.0
                    zt += c if fc else 0.0
                    zt += d if fd else 0.0
                    wt = 0.0
                    wt += wd[t, j, i] if fa else 0.0
                    wt += wd[t, j, i - 1] if fb else 0.0
                    wt += wd[t, j - 1, i - 1] if fc else 0.0
                    wt += wd[t, j - 1, i] if fd else 0.0
                    n = (1.0 if fa else 0.0) + (1.0 if fb else 0.0)
                    n += 1.0 if fc else 0.0
                    n += 1.0 if fd else 0.0
                    if n > 0:
                        zp = zt / n
                        w = wt / n
                    else:
                        zp = np.nan
                        w = np.nan
                else:
                    zp, w = _cell_to_point(zd, wd, t, j, i, ny, nx)
                zeta[t, j, i] = zp
                wp[t, j, i] = w
                if np.isfinite(w):
                    acc += w
                    cnt += 1.0
            rsum[j, t] = acc
            rcnt[j, t] = cnt
    # 3. Spatial standard deviation of W per snapshot (two passes), then the core flags.
    total = rsum.sum(axis=0)
    count = rcnt.sum(axis=0)
    wmean = np.where(count > 0, total / np.maximum(count, 1.0), 0.0)
    rss = np.zeros((ny, nt))
    for j in prange(ny):
        for t in range(nt):
            acc = 0.0
            m = wmean[t]
            for i in range(nx):
                w = wp[t, j, i]
                acc += (w - m) ** 2 if np.isfinite(w) else 0.0
            rss[j, t] = acc
    ss = rss.sum(axis=0)
    limit = np.where(count > 0, -ow_threshold * np.sqrt(ss / np.maximum(count, 1.0)), -np.inf)
    for j in prange(ny):
        for t in range(nt):
            lim = limit[t]
            for i in range(nx):
                core[t, j, i] = 1 if wp[t, j, i] < lim else 0
    return 0


class Workspace:
    """Scratch arrays of :func:`dual_fields`, kept between chunks of one thread.

    Reusing them avoids allocating (and page-faulting) several chunk-sized arrays per
    chunk. The ``zeta`` and ``core`` arrays returned by :func:`dual_fields` are views into
    the workspace, valid until its next use.
    """

    def __init__(self) -> None:
        self._store: dict[str, np.ndarray] = {}

    def _get(self, name: str, shape: tuple[int, ...], dtype) -> np.ndarray:
        size = int(np.prod(shape))
        buf = self._store.get(name)
        if buf is None or buf.size < size:
            buf = np.empty(size, dtype=dtype)
            self._store[name] = buf
        return buf[:size].reshape(shape)

    def arrays(self, shape: tuple[int, int, int]):
        nt, ny, nx = shape
        return (
            self._get("zeta", shape, np.float64),
            self._get("core", shape, np.uint8),
            self._get("zd", (nt, ny - 1, nx - 1), np.float64),
            self._get("wd", (nt, ny - 1, nx - 1), np.float64),
            self._get("wp", shape, np.float64),
        )


def dual_fields(
    u: np.ndarray,
    v: np.ndarray,
    gx: np.ndarray,
    gy: np.ndarray,
    ow_threshold: float,
    workspace: Workspace | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    r"""Vorticity and Okubo–Weiss eddy-core flags at the grid points of a ``(t, y, x)`` block.

    On each dual cell, vorticity is the circulation over the area (Stokes),
    :math:`\zeta = \sum_k g^x_k v_k - \sum_k g^y_k u_k`, and the strain uses the
    Green's-theorem derivatives with the cell mean removed,
    :math:`\partial q/\partial x = \sum_k g^x_k (q_k - \bar q)` (as
    :func:`coastmon.grid.operators.gradient_dual`), in
    :math:`W = (u_x - v_y)^2 + (v_x + u_y)^2 - \zeta^2` (Okubo 1970; Weiss 1991). Point values are the mean of the valid dual cells around the point, exactly
    as :func:`coastmon.grid.operators.vorticity`. A point is an eddy core when
    :math:`W < -\theta\,\sigma_W`, with :math:`\sigma_W` the spatial (population)
    standard deviation of W over the valid points of that snapshot.

    Parameters
    ----------
    u, v : (t, y, x) float32 or float64, NaN where missing.
    gx, gy : (4, y-1, x-1) Green's-theorem weights (:class:`~coastmon.grid.metrics.GridMetrics`).
    ow_threshold : the factor :math:`\theta`.
    workspace : scratch arrays to reuse (a new one when None).

    Returns
    -------
    zeta : (t, y, x) float64, s-1, NaN where no valid dual cell touches the point.
    core : (t, y, x) uint8, 1 at eddy cores.
    """
    if workspace is None:
        workspace = Workspace()
    zeta, core, zd, wd, wp = workspace.arrays(u.shape)
    _dual_fields(u, v, gx, gy, float(ow_threshold), zeta, core, zd, wd, wp)
    return zeta, core


@_compile(parallel=True)
def _chunk_moments(u, v, z, h, has_h, core, tindex, n, mean, m2, m3, ow):  # pragma: no cover
    # Written out variable by variable (pair packing as PAIR_INDEX, triples as TRIPLES) so
    # that the inner loops over x are branch-free and vectorise.
    ny = u.shape[1]
    nx = u.shape[2]
    inf = np.inf
    for j in prange(ny):
        cnt = np.zeros(nx)
        cores = np.zeros(nx)
        s = np.zeros((4, nx))
        c2 = np.zeros((10, nx))
        c3 = np.zeros((4, nx))
        for tt in range(tindex.shape[0]):
            t = tindex[tt]
            for i in range(nx):
                a = np.float64(u[t, j, i])
                b = np.float64(v[t, j, i])
                c = z[t, j, i]
                d = np.float64(h[t, j, i])
                ok = (abs(a) < inf) & (abs(b) < inf) & (abs(c) < inf) & ((abs(d) < inf) | (not has_h))
                cnt[i] += 1.0 if ok else 0.0
                cores[i] += np.float64(core[t, j, i]) if ok else 0.0
                s[0, i] += a if ok else 0.0
                s[1, i] += b if ok else 0.0
                s[2, i] += c if ok else 0.0
                s[3, i] += d if ok and has_h else 0.0
        for i in range(nx):
            scale = 1.0 / cnt[i] if cnt[i] > 0 else 0.0
            for k in range(4):
                s[k, i] *= scale
        for tt in range(tindex.shape[0]):
            t = tindex[tt]
            if has_h:
                for i in range(nx):
                    a = np.float64(u[t, j, i])
                    b = np.float64(v[t, j, i])
                    c = z[t, j, i]
                    d = np.float64(h[t, j, i])
                    ok = (abs(a) < inf) & (abs(b) < inf) & (abs(c) < inf) & (abs(d) < inf)
                    du = a - s[0, i] if ok else 0.0
                    dv = b - s[1, i] if ok else 0.0
                    dz = c - s[2, i] if ok else 0.0
                    dh = d - s[3, i] if ok else 0.0
                    c2[6, i] += du * dh
                    c2[7, i] += dv * dh
                    c2[8, i] += dz * dh
                    c2[9, i] += dh * dh
                    uu = du * du
                    vv = dv * dv
                    c2[0, i] += uu
                    c2[1, i] += du * dv
                    c2[2, i] += vv
                    c2[3, i] += du * dz
                    c2[4, i] += dv * dz
                    c2[5, i] += dz * dz
                    c3[0, i] += uu * du
                    c3[1, i] += du * vv
                    c3[2, i] += uu * dv
                    c3[3, i] += vv * dv
            else:
                for i in range(nx):
                    a = np.float64(u[t, j, i])
                    b = np.float64(v[t, j, i])
                    c = z[t, j, i]
                    ok = (abs(a) < inf) & (abs(b) < inf) & (abs(c) < inf)
                    du = a - s[0, i] if ok else 0.0
                    dv = b - s[1, i] if ok else 0.0
                    dz = c - s[2, i] if ok else 0.0
                    uu = du * du
                    vv = dv * dv
                    c2[0, i] += uu
                    c2[1, i] += du * dv
                    c2[2, i] += vv
                    c2[3, i] += du * dz
                    c2[4, i] += dv * dz
                    c2[5, i] += dz * dz
                    c3[0, i] += uu * du
                    c3[1, i] += du * vv
                    c3[2, i] += uu * dv
                    c3[3, i] += vv * dv
        nv = mean.shape[0]
        for i in range(nx):
            n[j, i] = cnt[i]
            ow[j, i] = cores[i]
            for k in range(nv):
                mean[k, j, i] = s[k, i]
            for k in range(m2.shape[0]):
                m2[k, j, i] = c2[k, i]
            for k in range(4):
                m3[k, j, i] = c3[k, i]
    return 0


def chunk_moments(
    u: np.ndarray,
    v: np.ndarray,
    zeta: np.ndarray,
    ssh: np.ndarray | None,
    core: np.ndarray,
    tindex: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    r"""Count, means and central co-moments per point over the time steps ``tindex``.

    A time step counts at a point only where u, v, ζ (and ssh) are all finite there.
    Two passes over time: means :math:`\bar x = n^{-1}\sum x`, then
    :math:`M_{ab} = \sum (x_a-\bar x_a)(x_b-\bar x_b)` and
    :math:`M_{abc} = \sum (x_a-\bar x_a)(x_b-\bar x_b)(x_c-\bar x_c)` (the two-pass
    algorithm; Chan, Golub & LeVeque 1983).

    Returns
    -------
    n : (y, x) count; mean : (nv, y, x); m2 : (nv(nv+1)/2, y, x) packed as
    :data:`PAIR_INDEX`; m3 : (4, y, x) as :data:`TRIPLES`; ow : (y, x) eddy-core count.
    Means are 0 where the count is 0.
    """
    has_h = ssh is not None
    nv = 4 if has_h else 3
    ny, nx = u.shape[1:]
    n = np.empty((ny, nx))
    mean = np.empty((nv, ny, nx))
    m2 = np.empty((nv * (nv + 1) // 2, ny, nx))
    m3 = np.empty((TRIPLES.shape[0], ny, nx))
    ow = np.empty((ny, nx))
    h = ssh if has_h else u  # never read when has_h is False
    _chunk_moments(u, v, zeta, h, has_h, core, np.ascontiguousarray(tindex, dtype=np.int64),
                   n, mean, m2, m3, ow)
    return n, mean, m2, m3, ow


@_compile(parallel=True)
def _merge(na, ma, m2a, m3a, owa, nb, mb, m2b, m3b, owb,
           pair_index, triples):  # pragma: no cover - compiled
    ny, nx = na.shape
    nv = ma.shape[0]
    ntrip = triples.shape[0]
    for j in prange(ny):
        delta = np.empty(nv)
        old = np.empty(m2a.shape[0])
        for i in range(nx):
            n2 = nb[j, i]
            owa[j, i] += owb[j, i]
            if n2 == 0:
                continue
            n1 = na[j, i]
            if n1 == 0:
                na[j, i] = n2
                for k in range(nv):
                    ma[k, j, i] = mb[k, j, i]
                for k in range(m2a.shape[0]):
                    m2a[k, j, i] = m2b[k, j, i]
                for k in range(ntrip):
                    m3a[k, j, i] = m3b[k, j, i]
                continue
            n = n1 + n2
            for k in range(nv):
                delta[k] = mb[k, j, i] - ma[k, j, i]
            for k in range(m2a.shape[0]):
                old[k] = m2a[k, j, i]
            for k in range(ntrip):
                x = triples[k, 0]
                y = triples[k, 1]
                w = triples[k, 2]
                m3a[k, j, i] = (
                    m3a[k, j, i] + m3b[k, j, i]
                    + n1 * n2 * (n1 - n2) / (n * n) * delta[x] * delta[y] * delta[w]
                    + (delta[x] * (n1 * m2b[pair_index[y, w], j, i] - n2 * old[pair_index[y, w]])
                       + delta[y] * (n1 * m2b[pair_index[x, w], j, i] - n2 * old[pair_index[x, w]])
                       + delta[w] * (n1 * m2b[pair_index[x, y], j, i] - n2 * old[pair_index[x, y]]))
                    / n
                )
            for a in range(nv):
                for b in range(a, nv):
                    p = pair_index[a, b]
                    m2a[p, j, i] = old[p] + m2b[p, j, i] + delta[a] * delta[b] * n1 * n2 / n
            for k in range(nv):
                ma[k, j, i] = ma[k, j, i] + delta[k] * n2 / n
            na[j, i] = n
    return 0


def merge_moments(
    a: tuple[np.ndarray, ...], b: tuple[np.ndarray, ...]
) -> None:
    r"""Merge moments ``b`` into ``a`` in place (both ``(n, mean, m2, m3, ow)`` tuples).

    With :math:`\delta = \bar x_b - \bar x_a` and :math:`n = n_a + n_b`:

    .. math::
        \bar x = \bar x_a + \delta\,n_b/n, \qquad
        M_{xy} = M^a_{xy} + M^b_{xy} + \delta_x\delta_y\,n_a n_b/n

    (Chan, Golub & LeVeque 1983), and for the third order (Pébay 2008, SAND2008-6212)

    .. math::
        M_{xyz} = M^a_{xyz} + M^b_{xyz} + \frac{n_a n_b (n_a - n_b)}{n^2}\delta_x\delta_y\delta_z
        + \frac{1}{n}\big[\delta_x (n_a M^b_{yz} - n_b M^a_{yz})
        + \delta_y (n_a M^b_{xz} - n_b M^a_{xz}) + \delta_z (n_a M^b_{xy} - n_b M^a_{xy})\big].

    Eddy-core counts add.
    """
    _merge(*a, *b, PAIR_INDEX, TRIPLES)


@_compile(parallel=False)
def _sample_rows(indptr, indices, weights, valid, x, out):  # pragma: no cover - compiled
    nt = x.shape[0]
    npts = indptr.shape[0] - 1
    for t in range(nt):
        for p in range(npts):
            if not valid[p]:
                out[t, p] = np.nan
                continue
            num = 0.0
            den = 0.0
            for k in range(indptr[p], indptr[p + 1]):
                val = np.float64(x[t, indices[k]])
                if np.isfinite(val):
                    num += weights[k] * val
                    den += weights[k]
            out[t, p] = num / den if den != 0.0 else np.nan
    return 0


def sample_rows(
    indptr: np.ndarray,
    indices: np.ndarray,
    weights: np.ndarray,
    valid: np.ndarray,
    x: np.ndarray,
) -> np.ndarray:
    r"""Apply a CSR sampling matrix W to each time step of ``x`` (t, n_grid), skipping NaN.

    :math:`s_p = \sum_k W_{pk} x_k [x_k\ \mathrm{finite}] / \sum_k W_{pk} [x_k\ \mathrm{finite}]`,
    i.e. ``(W @ fill0(x)) / (W @ isfinite(x))``; NaN where no weight meets a finite value
    or the row is not ``valid``. Returns float32 (t, n_points).
    """
    out = np.empty((x.shape[0], indptr.shape[0] - 1), dtype=np.float32)
    _sample_rows(indptr, indices, weights, valid, x, out)
    return out
