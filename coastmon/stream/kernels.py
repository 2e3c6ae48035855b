"""Compiled kernels of the streaming pass (numba).

The per-chunk work on a ``(time, y, x)`` block is done by:

* :func:`chunk_fields` — one fused kernel: relative vorticity, the Okubo–Weiss parameter
  and its eddy-core limit at the grid points, with the same Green's-theorem arithmetic
  as :mod:`coastmon.grid.operators` (dual-cell circulation, then the mean of the valid
  dual cells around each point), and, while each grid row is in cache, the count, means,
  second and third central co-moments of that row (two passes over the row's time
  steps); a vorticity given from outside (the native C-grid vorticity of
  :mod:`coastmon.io.sgrid`) takes the place of the computed one;
* :func:`chunk_moments` — the same moments for arrays given whole (used to build states
  from arrays);
* :func:`merge_moments` — the pairwise combination of two sets of moments
  (Chan, Golub & LeVeque 1983; Pébay 2008 for third order), in place;
* :class:`Sampler` — a sparse-matrix product that ignores missing inputs and
  renormalises each row's weights over the finite ones.

All kernels release the GIL (``nogil``) so that several chunks can be processed by
different threads at once; the number of threads each kernel uses inside is set by the
caller with :func:`numba.set_num_threads` (a per-thread setting). Compilation and its
on-disk cache are as :mod:`coastmon.compiled` sets them.
"""

from __future__ import annotations

import numba
import numpy as np
from numba import njit, prange

from coastmon.compiled import compiled

PAIR_INDEX = np.array(
    [[0, 1, 3, 6], [1, 2, 4, 7], [3, 4, 5, 8], [6, 7, 8, 9]], dtype=np.int64
)
"""Index of the co-moment of variables (a, b) in the packed triangle (symmetric):
``max(a, b) (max(a, b) + 1) / 2 + min(a, b)``, so the pairs of the first three variables
(u, v, ζ) fill indices 0–5 and those involving ssh follow."""

TRIPLES = np.array([[0, 0, 0], [0, 1, 1], [0, 0, 1], [1, 1, 1]], dtype=np.int64)
"""Variable indices of the third-order co-moments kept: uuu, uvv, uuv, vvv."""


@njit(nogil=True, fastmath={"reassoc"})
def _w_row_sums(w, t, j, wsum, wsq, wcnt):  # pragma: no cover - compiled
    """Sum, sum of squares and count of the finite W of one row of one snapshot.

    The sums may be reassociated (so the loop vectorises); they only set the eddy-core
    threshold, where a change in the last bits does not matter.
    """
    acc = 0.0
    acc2 = 0.0
    cnt = 0.0
    for i in range(w.shape[2]):
        wp = w[t, j, i]
        good = np.isfinite(wp)
        acc += wp if good else 0.0
        acc2 += wp * wp if good else 0.0
        cnt += 1.0 if good else 0.0
    wsum[j, t] = acc
    wsq[j, t] = acc2
    wcnt[j, t] = cnt


@njit(nogil=True)
def _ow_limits(wsum, wsq, wcnt, ow_threshold, limit):  # pragma: no cover - compiled
    """Eddy-core threshold per snapshot, -theta * sigma_W, from the row sums.

    W has near-zero mean against its spread, so the one-pass sums lose nothing that
    matters here.
    """
    for t in range(limit.shape[0]):
        total = 0.0
        total2 = 0.0
        count = 0.0
        for j in range(wsum.shape[0]):
            total += wsum[j, t]
            total2 += wsq[j, t]
            count += wcnt[j, t]
        if count > 0:
            mean = total / count
            var = max(total2 / count - mean * mean, 0.0)
            limit[t] = -ow_threshold * np.sqrt(var)
        else:
            limit[t] = -np.inf


@njit(nogil=True)
def _dual_row(u, v, gx, gy, j, zrow, wrow):  # pragma: no cover - compiled
    """Vorticity and W on dual row j for every time step, into zrow/wrow[:, 1:nx].

    A row's 16 weight vectors stay in cache over all time steps.
    """
    nt = u.shape[0]
    nx = u.shape[2]
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
            g0 = gx[0, j, i]
            g1 = gx[1, j, i]
            g2 = gx[2, j, i]
            g3 = gx[3, j, i]
            h0 = gy[0, j, i]
            h1 = gy[1, j, i]
            h2 = gy[2, j, i]
            h3 = gy[3, j, i]
            ux = g0 * u0
            ux = ux + g1 * u1
            ux = ux + g2 * u2
            ux = ux + g3 * u3
            uy = h0 * u0
            uy = uy + h1 * u1
            uy = uy + h2 * u2
            uy = uy + h3 * u3
            vx = g0 * v0
            vx = vx + g1 * v1
            vx = vx + g2 * v2
            vx = vx + g3 * v3
            vy = h0 * v0
            vy = vy + h1 * v1
            vy = vy + h2 * v2
            vy = vy + h3 * v3
            z = vx - uy
            # Strain uses derivatives with the cell mean removed, as
            # coastmon.grid.operators.gradient_dual does; vorticity is the circulation.
            mu = 0.25 * (((u0 + u1) + u2) + u3)
            mv = 0.25 * (((v0 + v1) + v2) + v3)
            sgx = ((g0 + g1) + g2) + g3
            sgy = ((h0 + h1) + h2) + h3
            ux = ux - mu * sgx
            uy = uy - mu * sgy
            vx = vx - mv * sgx
            vy = vy - mv * sgy
            zrow[t, i + 1] = z
            # Spherical metric terms: -sgy = tan(lat)/a (operators.strain).
            sn = (ux - vy) + mv * sgy
            ss = (vx + uy) - mu * sgy
            wrow[t, i + 1] = sn**2 + ss**2 - z**2


@njit(nogil=True)
def _strain_row(u, v, gx, gy, j, srow):  # pragma: no cover - compiled
    """Squared strain on dual row j for every time step, into srow[:, 1:nx].

    The arithmetic of :func:`_dual_row` without the circulation.
    """
    nt = u.shape[0]
    nx = u.shape[2]
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
            mu = 0.25 * (((u0 + u1) + u2) + u3)
            mv = 0.25 * (((v0 + v1) + v2) + v3)
            d0 = u0 - mu
            d1 = u1 - mu
            d2 = u2 - mu
            d3 = u3 - mu
            e0 = v0 - mv
            e1 = v1 - mv
            e2 = v2 - mv
            e3 = v3 - mv
            ux = ((gx[0, j, i] * d0 + gx[1, j, i] * d1) + gx[2, j, i] * d2) + gx[3, j, i] * d3
            uy = ((gy[0, j, i] * d0 + gy[1, j, i] * d1) + gy[2, j, i] * d2) + gy[3, j, i] * d3
            vx = ((gx[0, j, i] * e0 + gx[1, j, i] * e1) + gx[2, j, i] * e2) + gx[3, j, i] * e3
            vy = ((gy[0, j, i] * e0 + gy[1, j, i] * e1) + gy[2, j, i] * e2) + gy[3, j, i] * e3
            # Spherical metric terms: -sgy = tan(lat)/a (operators.strain).
            sgy = ((gy[0, j, i] + gy[1, j, i]) + gy[2, j, i]) + gy[3, j, i]
            sn = (ux - vy) + mv * sgy
            ss = (vx + uy) - mu * sgy
            srow[t, i + 1] = sn**2 + ss**2


@njit(nogil=True)
def _dual_points(zcur, wcur, zprev, wprev, t, j, zrow, zout, w):  # pragma: no cover
    """Point values of ζ and W on row j, snapshot t: the mean of the valid dual cells.

    Same order as grid.metrics._to_points: the cell having the point as vertex 0, then
    1, 2, 3; missing cells add exactly 0. ζ goes to the row buffer (float64) and to
    ``zout`` (its dtype), W to ``w``.
    """
    nx = zrow.shape[1]
    for i in range(nx):
        a = zcur[t, i + 1]
        bb = zcur[t, i]
        c = zprev[t, i]
        d = zprev[t, i + 1]
        fa = np.isfinite(a)
        fb = np.isfinite(bb)
        fc = np.isfinite(c)
        fd = np.isfinite(d)
        zt = 0.0
        zt += a if fa else 0.0
        zt += bb if fb else 0.0
        zt += c if fc else 0.0
        zt += d if fd else 0.0
        wt = 0.0
        wt += wcur[t, i + 1] if fa else 0.0
        wt += wcur[t, i] if fb else 0.0
        wt += wprev[t, i] if fc else 0.0
        wt += wprev[t, i + 1] if fd else 0.0
        n = (1.0 if fa else 0.0) + (1.0 if fb else 0.0)
        n += 1.0 if fc else 0.0
        n += 1.0 if fd else 0.0
        valid = n > 0.0
        z = zt / n if valid else np.nan
        zrow[t, i] = z
        zout[t, j, i] = z
        w[t, j, i] = wt / n if valid else np.nan


@njit(nogil=True)
def _given_points(scur, sprev, zin, t, j, zrow, w):  # pragma: no cover
    """Point values on row j, snapshot t, with ζ given: W = mean squared strain - ζ²."""
    nx = zrow.shape[1]
    for i in range(nx):
        a = scur[t, i + 1]
        bb = scur[t, i]
        c = sprev[t, i]
        d = sprev[t, i + 1]
        fa = np.isfinite(a)
        fb = np.isfinite(bb)
        fc = np.isfinite(c)
        fd = np.isfinite(d)
        st = 0.0
        st += a if fa else 0.0
        st += bb if fb else 0.0
        st += c if fc else 0.0
        st += d if fd else 0.0
        n = (1.0 if fa else 0.0) + (1.0 if fb else 0.0)
        n += 1.0 if fc else 0.0
        n += 1.0 if fd else 0.0
        z = np.float64(zin[t, j, i])
        zrow[t, i] = z
        w[t, j, i] = st / n - z * z if n > 0.0 else np.nan


@njit(nogil=True)
def _row_moments(u, v, zr, h, has_h, j, tsel, cnt, s, acc):  # pragma: no cover - compiled
    """Count, means and central co-moments of row j over the time steps ``tsel``.

    ``zr[t, i]`` is the vorticity of row j. Two passes over time (means, then co-moments
    about them), written out variable by variable with branch-free selects so that the
    loops over x vectorise. ``acc`` holds the 10 pair sums (packed as :data:`PAIR_INDEX`)
    then the 4 triple sums (:data:`TRIPLES`), all in one array so that the compiler needs
    no run-time overlap checks between them.
    """
    nx = u.shape[2]
    inf = np.inf
    cnt[:] = 0.0
    s[:, :] = 0.0
    acc[:, :] = 0.0
    for tt in range(tsel.shape[0]):
        t = tsel[tt]
        for i in range(nx):
            a = np.float64(u[t, j, i])
            b = np.float64(v[t, j, i])
            c = zr[t, i]
            d = np.float64(h[t, j, i])
            ok = (abs(a) < inf) & (abs(b) < inf) & (abs(c) < inf) & ((abs(d) < inf) | (not has_h))
            cnt[i] += 1.0 if ok else 0.0
            s[0, i] += a if ok else 0.0
            s[1, i] += b if ok else 0.0
            s[2, i] += c if ok else 0.0
            s[3, i] += d if ok and has_h else 0.0
    for i in range(nx):
        scale = 1.0 / cnt[i] if cnt[i] > 0 else 0.0
        for k in range(4):
            s[k, i] *= scale
    for tt in range(tsel.shape[0]):
        t = tsel[tt]
        if has_h:
            for i in range(nx):
                a = np.float64(u[t, j, i])
                b = np.float64(v[t, j, i])
                c = zr[t, i]
                d = np.float64(h[t, j, i])
                ok = (abs(a) < inf) & (abs(b) < inf) & (abs(c) < inf) & (abs(d) < inf)
                du = a - s[0, i] if ok else 0.0
                dv = b - s[1, i] if ok else 0.0
                dz = c - s[2, i] if ok else 0.0
                dh = d - s[3, i] if ok else 0.0
                uu = du * du
                vv = dv * dv
                acc[0, i] += uu
                acc[1, i] += du * dv
                acc[2, i] += vv
                acc[3, i] += du * dz
                acc[4, i] += dv * dz
                acc[5, i] += dz * dz
                acc[6, i] += du * dh
                acc[7, i] += dv * dh
                acc[8, i] += dz * dh
                acc[9, i] += dh * dh
                acc[10, i] += uu * du
                acc[11, i] += du * vv
                acc[12, i] += uu * dv
                acc[13, i] += vv * dv
        else:
            for i in range(nx):
                a = np.float64(u[t, j, i])
                b = np.float64(v[t, j, i])
                c = zr[t, i]
                ok = (abs(a) < inf) & (abs(b) < inf) & (abs(c) < inf)
                du = a - s[0, i] if ok else 0.0
                dv = b - s[1, i] if ok else 0.0
                dz = c - s[2, i] if ok else 0.0
                uu = du * du
                vv = dv * dv
                acc[0, i] += uu
                acc[1, i] += du * dv
                acc[2, i] += vv
                acc[3, i] += du * dz
                acc[4, i] += dv * dz
                acc[5, i] += dz * dz
                acc[10, i] += uu * du
                acc[11, i] += du * vv
                acc[12, i] += uu * dv
                acc[13, i] += vv * dv


@njit(nogil=True)
def _store_row(g, j, cnt, s, acc, n, mean, m2, m3):  # pragma: no cover - compiled
    nx = cnt.shape[0]
    for i in range(nx):
        n[g, j, i] = cnt[i]
    for k in range(mean.shape[1]):
        for i in range(nx):
            mean[g, k, j, i] = s[k, i]
    for k in range(m2.shape[1]):
        for i in range(nx):
            m2[g, k, j, i] = acc[k, i]
    for k in range(m3.shape[1]):
        for i in range(nx):
            m3[g, k, j, i] = acc[10 + k, i]


@njit(nogil=True)
def _row_cores(w, limit, j, tsel, g, ow):  # pragma: no cover - compiled
    """Eddy-core count of row j over ``tsel``: snapshots with W < limit (NaN W never counts)."""
    nx = w.shape[2]
    for i in range(nx):
        ow[g, j, i] = 0.0
    for tt in range(tsel.shape[0]):
        t = tsel[tt]
        lim = limit[t]
        for i in range(nx):
            ow[g, j, i] += 1.0 if w[t, j, i] < lim else 0.0


@compiled(parallel=True)
def _chunk_kernel(u, v, zin, h, has_z, has_h, gx, gy, ow_threshold, order, starts,
                  zout, w, limit, n, mean, m2, m3, ow, n_bands):  # pragma: no cover
    nt, ny, nx = u.shape
    n_groups = starts.shape[0] - 1
    wsum = np.zeros((ny, nt))
    wsq = np.zeros((ny, nt))
    wcnt = np.zeros((ny, nt))
    for b in prange(n_bands):
        r0 = b * ny // n_bands
        r1 = (b + 1) * ny // n_bands
        # Rolling rows of dual cells, padded with NaN: index i + 1 holds dual column i.
        zprev = np.full((nt, nx + 1), np.nan)
        wprev = np.full((nt, nx + 1), np.nan)
        zcur = np.full((nt, nx + 1), np.nan)
        wcur = np.full((nt, nx + 1), np.nan)
        zrow = np.empty((nt, nx))
        cnt = np.empty(nx)
        s = np.empty((4, nx))
        acc = np.empty((14, nx))
        if r0 > 0:
            if has_z:
                _strain_row(u, v, gx, gy, r0 - 1, wprev)
            else:
                _dual_row(u, v, gx, gy, r0 - 1, zprev, wprev)
        for j in range(r0, r1):
            if j < ny - 1:
                if has_z:
                    _strain_row(u, v, gx, gy, j, wcur)
                else:
                    _dual_row(u, v, gx, gy, j, zcur, wcur)
            else:
                zcur[:, :] = np.nan
                wcur[:, :] = np.nan
            for t in range(nt):
                if has_z:
                    _given_points(wcur, wprev, zin, t, j, zrow, w)
                else:
                    _dual_points(zcur, wcur, zprev, wprev, t, j, zrow, zout, w)
                # Row sums for the spatial statistics of W (a separate loop, so that the
                # one above has no cross-iteration dependence and vectorises).
                _w_row_sums(w, t, j, wsum, wsq, wcnt)
                if has_h:
                    # A step counts only where ssh is finite too (after σ_W, which uses
                    # every finite W).
                    for i in range(nx):
                        w[t, j, i] = w[t, j, i] if np.isfinite(h[t, j, i]) else np.nan
            for g in range(n_groups):
                tsel = order[starts[g]:starts[g + 1]]
                _row_moments(u, v, zrow, h, has_h, j, tsel, cnt, s, acc)
                _store_row(g, j, cnt, s, acc, n, mean, m2, m3)
            zprev, zcur = zcur, zprev
            wprev, wcur = wcur, wprev
    _ow_limits(wsum, wsq, wcnt, ow_threshold, limit)
    for j in prange(ny):
        for g in range(n_groups):
            _row_cores(w, limit, j, order[starts[g]:starts[g + 1]], g, ow)
    return 0


@compiled(parallel=True)
def _block_moments(u, v, z, h, has_h, w, limit, order, starts, n, mean, m2, m3, ow):  # pragma: no cover
    ny = u.shape[1]
    nx = u.shape[2]
    n_groups = starts.shape[0] - 1
    for j in prange(ny):
        zr = np.ascontiguousarray(z[:, j, :])
        cnt = np.empty(nx)
        s = np.empty((4, nx))
        acc = np.empty((14, nx))
        for g in range(n_groups):
            tsel = order[starts[g]:starts[g + 1]]
            _row_moments(u, v, zr, h, has_h, j, tsel, cnt, s, acc)
            _store_row(g, j, cnt, s, acc, n, mean, m2, m3)
            _row_cores(w, limit, j, tsel, g, ow)
    return 0


class Workspace:
    """Scratch arrays of :func:`chunk_fields`, kept between chunks of one thread.

    Reusing them avoids allocating (and page-faulting) chunk-sized arrays for every chunk.
    The ζ and W returned by :func:`chunk_fields` are views into the workspace, valid until
    its next use.
    """

    def __init__(self) -> None:
        self._store: dict[str, np.ndarray] = {}

    def get(self, name: str, shape: tuple[int, ...], dtype) -> np.ndarray:
        size = int(np.prod(shape))
        key = f"{name}:{np.dtype(dtype).str}"
        buf = self._store.get(key)
        if buf is None or buf.size < size:
            buf = np.empty(size, dtype=dtype)
            self._store[key] = buf
        return buf[:size].reshape(shape)


def _group_order(groups: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Time steps sorted by group, the start of each group in that order, and the groups."""
    groups = np.asarray(groups, dtype=np.int64)
    labels, local = np.unique(groups, return_inverse=True)
    order = np.argsort(local, kind="stable").astype(np.int64)
    starts = np.searchsorted(local[order], np.arange(labels.size + 1)).astype(np.int64)
    return order, starts, labels


def _moment_arrays(n_groups: int, nv: int, shape: tuple[int, int]):
    ny, nx = shape
    return (np.empty((n_groups, ny, nx)), np.empty((n_groups, nv, ny, nx)),
            np.empty((n_groups, nv * (nv + 1) // 2, ny, nx)),
            np.empty((n_groups, TRIPLES.shape[0], ny, nx)), np.empty((n_groups, ny, nx)))


def chunk_fields(
    u: np.ndarray,
    v: np.ndarray,
    gx: np.ndarray,
    gy: np.ndarray,
    ow_threshold: float,
    groups: np.ndarray | None = None,
    ssh: np.ndarray | None = None,
    zeta: np.ndarray | None = None,
    workspace: Workspace | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, dict[int, tuple]]:
    r"""All the per-chunk work on a ``(t, y, x)`` block, in one compiled kernel.

    Vorticity and the Okubo–Weiss parameter at the points, the eddy-core limit of each
    snapshot, and per group of time steps the count, means, second and third central
    co-moments and eddy-core counts (:func:`chunk_moments` defines them).

    On each dual cell, vorticity is the circulation over the area (Stokes),
    :math:`\zeta = \sum_k g^x_k v_k - \sum_k g^y_k u_k`, and the strain uses the
    Green's-theorem derivatives with the cell mean removed,
    :math:`\partial q/\partial x = \sum_k g^x_k (q_k - \bar q)` (as
    :func:`coastmon.grid.operators.gradient_dual`), in
    :math:`W = (u_x - v_y - v\tan\varphi/a)^2 + (v_x + u_y + u\tan\varphi/a)^2 - \zeta^2`
    (Okubo 1970; Weiss 1991; spherical metric terms as in
    :func:`coastmon.grid.operators.strain`).
    Point values are the mean of the valid dual cells around the point, exactly as
    :func:`coastmon.grid.operators.vorticity` and ``okubo_weiss``. With ``zeta`` given
    (e.g. the native C-grid vorticity of :mod:`coastmon.io.sgrid`), W is the mean
    squared strain of the dual cells around the point minus the given ζ², NaN where ζ is
    missing. A point is an eddy core when :math:`W < -\theta\,\sigma_W`, with
    :math:`\sigma_W` the spatial (population) standard deviation of W over the valid
    points of that snapshot.

    The kernel walks the grid in bands of rows; each dual-cell row is computed for all
    time steps while its weights are in cache, into two rolling rows, and the moments of
    a grid row are accumulated from its vorticity row while that row is in cache. Only ζ
    (for sampling) and W (for the eddy-core count, which needs σ_W of whole snapshots) are
    written out.

    Parameters
    ----------
    u, v : (t, y, x) float32 or float64, NaN where missing.
    gx, gy : (4, y-1, x-1) Green's-theorem weights (:class:`~coastmon.grid.metrics.GridMetrics`).
    ow_threshold : the factor :math:`\theta`.
    groups : (t,) group label of each step (e.g. calendar month - 1); all 0 when None.
    ssh : (t, y, x) sea surface height or None.
    zeta : (t, y, x) given vorticity, or None to compute it from u and v.
    workspace : scratch arrays to reuse (a new one when None).

    Returns
    -------
    zeta : (t, y, x) vorticity (s-1): the given array, or the computed one (float64);
        NaN where no valid dual cell touches the point.
    w : (t, y, x) float64 Okubo–Weiss parameter (s-2), NaN where a step does not count
        (also where ssh is missing).
    limit : (t,) the eddy-core limit :math:`-\theta\sigma_W` of each snapshot
        (``-inf`` when the snapshot has no valid point).
    parts : ``{group: (n, mean, m2, m3, ow)}`` as returned by :func:`chunk_moments`.
    """
    workspace = Workspace() if workspace is None else workspace
    shape = u.shape
    has_z, has_h = zeta is not None, ssh is not None
    groups = np.zeros(shape[0], dtype=np.int64) if groups is None else groups
    order, starts, labels = _group_order(groups)
    nv = 4 if has_h else 3
    arrays = _moment_arrays(labels.size, nv, shape[1:])
    zout = workspace.get("zeta", (1, 1, 1) if has_z else shape, np.float64)
    w = workspace.get("w", shape, np.float64)
    limit = workspace.get("limit", shape[:1], np.float64)
    n_bands = max(1, min(shape[1], 4 * numba.get_num_threads()))
    _chunk_kernel(u, v, zeta if has_z else u, ssh if has_h else u, has_z, has_h, gx, gy,
                  float(ow_threshold), order, starts, zout, w, limit, *arrays, n_bands)
    parts = {int(g): tuple(a[k] for a in arrays) for k, g in enumerate(labels)}
    return (zeta if has_z else zout), w, limit, parts


def dual_fields(u, v, gx, gy, ow_threshold, workspace=None):
    """ζ (float64), W and the eddy-core limit of a block, as :func:`chunk_fields` computes them."""
    zeta, w, limit, _ = chunk_fields(u, v, gx, gy, ow_threshold, workspace=workspace)
    return zeta, w, limit


def chunk_moments(
    u: np.ndarray,
    v: np.ndarray,
    zeta: np.ndarray,
    ssh: np.ndarray | None,
    w: np.ndarray,
    limit: np.ndarray,
    tindex: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    r"""Count, means and central co-moments per point over the time steps ``tindex``.

    A time step counts at a point only where u, v, ζ (and ssh) are all finite there; it
    counts as an eddy core where also ``w[t] < limit[t]``. Two passes over time: means
    :math:`\bar x = n^{-1}\sum x`, then :math:`M_{ab} = \sum (x_a-\bar x_a)(x_b-\bar x_b)`
    and :math:`M_{abc} = \sum (x_a-\bar x_a)(x_b-\bar x_b)(x_c-\bar x_c)` (the two-pass
    algorithm; Chan, Golub & LeVeque 1983). :func:`chunk_fields` computes the same
    quantities inside its fused kernel.

    Returns
    -------
    n : (y, x) count; mean : (nv, y, x); m2 : (nv(nv+1)/2, y, x) packed as
    :data:`PAIR_INDEX`; m3 : (4, y, x) as :data:`TRIPLES`; ow : (y, x) eddy-core count.
    Means are 0 where the count is 0.
    """
    has_h = ssh is not None
    h = ssh if has_h else u  # never read when has_h is False
    zeta = np.asarray(zeta, dtype=np.float64)
    valid = np.isfinite(u) & np.isfinite(v) & np.isfinite(zeta)
    if has_h:
        valid &= np.isfinite(ssh)
    w = np.where(valid, w, np.nan)
    tindex = np.ascontiguousarray(tindex, dtype=np.int64)
    arrays = _moment_arrays(1, 4 if has_h else 3, u.shape[1:])
    _block_moments(u, v, zeta, h, has_h, w, np.asarray(limit, dtype=np.float64), tindex,
                   np.array([0, tindex.size], dtype=np.int64), *arrays)
    return tuple(a[0] for a in arrays)


@compiled(parallel=True)
def _merge(na, ma, m2a, m3a, owa, nb, mb, m2b, m3b, owb):  # pragma: no cover - compiled
    # Written out term by term (pairs as PAIR_INDEX, triples uuu, uvv, uuv, vvv) so the
    # loop over x vectorises; s = n_b / n, r = n_a n_b / n.
    ny, nx = na.shape
    has_h = ma.shape[0] == 4
    for j in prange(ny):
        for i in range(nx):
            owa[j, i] += owb[j, i]
        for i in range(nx):
            n1 = na[j, i]
            n2 = nb[j, i]
            n = n1 + n2
            empty = n2 == 0.0
            inv = 1.0 / n if n > 0.0 else 0.0
            du = 0.0 if empty else mb[0, j, i] - ma[0, j, i]
            dv = 0.0 if empty else mb[1, j, i] - ma[1, j, i]
            dz = 0.0 if empty else mb[2, j, i] - ma[2, j, i]
            r = n1 * n2 * inv
            c3 = n1 * n2 * (n1 - n2) * inv * inv
            auu, auv, avv = m2a[0, j, i], m2a[1, j, i], m2a[2, j, i]
            buu, buv, bvv = m2b[0, j, i], m2b[1, j, i], m2b[2, j, i]
            if not empty:
                m3a[0, j, i] += m3b[0, j, i] + c3 * du * du * du + inv * (
                    3.0 * du * (n1 * buu - n2 * auu))
                m3a[1, j, i] += m3b[1, j, i] + c3 * du * dv * dv + inv * (
                    du * (n1 * bvv - n2 * avv) + 2.0 * dv * (n1 * buv - n2 * auv))
                m3a[2, j, i] += m3b[2, j, i] + c3 * du * du * dv + inv * (
                    2.0 * du * (n1 * buv - n2 * auv) + dv * (n1 * buu - n2 * auu))
                m3a[3, j, i] += m3b[3, j, i] + c3 * dv * dv * dv + inv * (
                    3.0 * dv * (n1 * bvv - n2 * avv))
                m2a[0, j, i] = auu + buu + du * du * r
                m2a[1, j, i] = auv + buv + du * dv * r
                m2a[2, j, i] = avv + bvv + dv * dv * r
                m2a[3, j, i] += m2b[3, j, i] + du * dz * r
                m2a[4, j, i] += m2b[4, j, i] + dv * dz * r
                m2a[5, j, i] += m2b[5, j, i] + dz * dz * r
                s = n2 * inv
                ma[0, j, i] += du * s
                ma[1, j, i] += dv * s
                ma[2, j, i] += dz * s
                if has_h:
                    dh = mb[3, j, i] - ma[3, j, i]
                    m2a[6, j, i] += m2b[6, j, i] + du * dh * r
                    m2a[7, j, i] += m2b[7, j, i] + dv * dh * r
                    m2a[8, j, i] += m2b[8, j, i] + dz * dh * r
                    m2a[9, j, i] += m2b[9, j, i] + dh * dh * r
                    ma[3, j, i] += dh * s
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
    _merge(*a, *b)


SAMPLE_STEPS = 16
"""Time steps the sampler computes together: each point's indices and weights are read
once for them (1.6 times as fast as one step at a time on the long benchmark record)."""


@compiled(parallel=True)
def _sample_split(indptr, cols, weights, valid, x, first, second, t0):  # pragma: no cover
    nt = x.shape[0]
    n_st = first.shape[0]
    n_blocks = (nt + SAMPLE_STEPS - 1) // SAMPLE_STEPS
    for b in prange(n_blocks):
        ta = b * SAMPLE_STEPS
        n = min(nt, ta + SAMPLE_STEPS) - ta
        num = np.zeros(SAMPLE_STEPS)
        den = np.zeros(SAMPLE_STEPS)
        for part in range(2):
            out = first if part == 0 else second
            width = out.shape[2]
            base = 0 if part == 0 else n_st * first.shape[2]
            for s in range(out.shape[0]):
                for j in range(width):
                    p = base + s * width + j
                    num[:] = 0.0
                    den[:] = 0.0
                    for k in range(indptr[p], indptr[p + 1]):
                        c = cols[k]
                        w = weights[k]
                        for i in range(n):
                            val = np.float64(x[ta + i, c])
                            if np.isfinite(val):
                                num[i] += w * val
                                den[i] += w
                    for i in range(n):
                        ok = valid[p] and den[i] != 0.0
                        out[s, t0 + ta + i, j] = num[i] / den[i] if ok else np.nan
    return 0


STORED_TILE_STEPS = 64
"""Steps of the rays copied at once into their (time, row) block (:func:`_sample_stored`)."""


@compiled()
def _sample_stored(indptr, cols, weights, valid, flat, n_points, starts, r0, out,
                   lines):  # pragma: no cover - compiled
    # Rows r0, r0 + 1, ... of the sampling matrix applied to stored grid-point series,
    # with the arithmetic of _sample_split (the same float64 sums in the same order),
    # into ``out`` (time, row). The series are ``flat``, tiles of consecutive steps
    # (:class:`coastmon.stream.rays.TiledPoints`): steps ``starts[j]:starts[j + 1]`` of
    # every one of the ``n_points`` grid points, point-major, from element
    # ``n_points * starts[j]``. The sums run without the finiteness test first (a loop
    # the compiler vectorises); a step whose sum is not finite met a missing value and is
    # summed again as _sample_split sums it. Where every value is finite both give the
    # same numbers: the same products added in the same order, and the weights' sum is
    # then the same at every step. Each row is computed into a contiguous line and the
    # lines are then copied into ``out`` a few steps at a time: writing ``out`` a
    # column at a time touches a cache line per step, which on long records evicts the
    # sums before the next row (superlinear). ``lines`` (rows, time), of out's type, is
    # the caller's, reused from call to call.
    nt = starts[-1]
    n_tiles = starts.size - 1
    n_rows = out.shape[1]
    num = np.zeros(nt)
    # Loops run over views that start at 0 (one tile's segment of a series): with
    # offsets in the indices instead, the compiler does not vectorise them (4 x slower).
    for j in range(n_rows):
        p = r0 + j
        if not valid[p]:
            lines[j, :] = np.nan
            continue
        num[:] = 0.0
        w_sum = 0.0
        for k in range(indptr[p], indptr[p + 1]):
            c = cols[k]
            w = weights[k]
            w_sum += w
            for q in range(n_tiles):
                t0 = starts[q]
                n = starts[q + 1] - t0
                at = n_points * t0 + c * n
                seg = flat[at:at + n]
                acc = num[t0:t0 + n]
                for i in range(n):
                    acc[i] += w * np.float64(seg[i])
        for q in range(n_tiles):
            t0 = starts[q]
            n = starts[q + 1] - t0
            acc = num[t0:t0 + n]
            line = lines[j, t0:t0 + n]
            for i in range(n):
                if np.isfinite(acc[i]):
                    line[i] = acc[i] / w_sum if w_sum != 0.0 else np.nan
                else:
                    n_i = 0.0
                    d_i = 0.0
                    for k in range(indptr[p], indptr[p + 1]):
                        val = np.float64(flat[n_points * t0 + cols[k] * n + i])
                        if np.isfinite(val):
                            n_i += weights[k] * val
                            d_i += weights[k]
                    line[i] = n_i / d_i if d_i != 0.0 else np.nan
    for i0 in range(0, nt, STORED_TILE_STEPS):
        for i in range(i0, min(nt, i0 + STORED_TILE_STEPS)):
            for j in range(n_rows):
                out[i, j] = lines[j, i]
    return 0


@compiled()
def _gather_tiles(flat, n_points, starts, index, out):  # pragma: no cover - compiled
    # out[k, :] = the whole series of grid point index[k] from the tiles of
    # :class:`coastmon.stream.rays.TiledPoints` (indices checked by the caller).
    for q in range(starts.size - 1):
        t0 = starts[q]
        n = starts[q + 1] - t0
        for k in range(index.size):
            at = n_points * t0 + index[k] * n
            out[k, t0:t0 + n] = flat[at:at + n]
    return 0


def concurrent_calls_safe() -> bool:
    """Whether several threads may run the parallel kernels at once.

    numba's OpenMP and TBB threading layers allow it; its fallback ``workqueue`` layer
    (used when neither library is installed) does not, and the pass then processes one
    chunk at a time.
    """
    one = np.ones((1, 1))
    _merge(one.copy(), np.zeros((3, 1, 1)), np.zeros((6, 1, 1)), np.zeros((4, 1, 1)),
           one.copy(), one.copy(), np.zeros((3, 1, 1)), np.zeros((6, 1, 1)),
           np.zeros((4, 1, 1)), one.copy())
    return numba.threading_layer() != "workqueue"


def sorted_entries(matrix) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The non-zeros of a sparse matrix row by row, each row's in column order:
    ``(rows, cols, weights)`` (int64, int64, float64), the order the samplers sum in."""
    coo = matrix.tocoo()
    order = np.lexsort((coo.col, coo.row))
    return (np.asarray(coo.row[order], dtype=np.int64),
            np.ascontiguousarray(coo.col[order], dtype=np.int64),
            np.ascontiguousarray(coo.data[order], dtype=np.float64))


def row_pointers(rows: np.ndarray, n_rows: int) -> np.ndarray:
    """CSR row pointers of sorted row indices."""
    indptr = np.zeros(n_rows + 1, dtype=np.int64)
    np.cumsum(np.bincount(rows, minlength=n_rows), out=indptr[1:])
    return indptr


class Sampler:
    r"""A sparse sampling matrix W applied to each time step, skipping missing values.

    :math:`s_p = \sum_k W_{pk} x_k [x_k\ \mathrm{finite}] / \sum_k W_{pk} [x_k\ \mathrm{finite}]`,
    i.e. ``(W @ fill0(x)) / (W @ isfinite(x))``; NaN where no weight meets a finite value
    or the row is not ``valid``. Each point gathers its few non-zeros (row by row, each
    row's in column order; sums in float64, stored as float32).

    The points are the frame's (:meth:`coastmon.geometry.frame.Frame.split`): ``S x O``
    section points, then ``S x R`` ray points. :meth:`into` writes them straight into
    station-major blocks ``(S, time, O)`` and ``(S, time, R)``, the layout of the series
    files (:class:`coastmon.stream.SeriesFile`), so nothing is copied between the kernel
    and the file.
    """

    def __init__(self, matrix, valid: np.ndarray, n_stations: int, n_offsets: int,
                 grid_points: int | None = None) -> None:
        rows, self.cols, self.weights = sorted_entries(matrix)
        self.indptr = row_pointers(rows, matrix.shape[0])
        self.valid = np.ascontiguousarray(valid, dtype=np.bool_)
        self.n_points = int(matrix.shape[0])
        self.n_stations = int(n_stations)
        self.n_offsets = int(n_offsets)
        rest = self.n_points - self.n_stations * self.n_offsets
        if grid_points is not None:
            # The second part holds grid points as they are, one per row (the rays are
            # computed from them when read: coastmon.stream.rays).
            self.second = (int(grid_points), 1)
        else:
            self.second = (self.n_stations, rest // max(self.n_stations, 1))
        if self.second[0] * self.second[1] != rest or rest < 0:
            raise ValueError(f"{self.n_points} points are not {self.n_stations} stations "
                             f"with {self.n_offsets} section points and a ray each")

    def blocks(self, n_time: int) -> tuple[np.ndarray, np.ndarray]:
        """Empty float32 ``(S, n_time, O)`` and ``(S, n_time, R)`` blocks for :meth:`into`
        (``(P, n_time, 1)`` for the second when it holds ``P`` grid points)."""
        return (np.empty((self.n_stations, n_time, self.n_offsets), dtype=np.float32),
                np.empty((self.second[0], n_time, self.second[1]), dtype=np.float32))

    def into(self, x: np.ndarray, section: np.ndarray, rays: np.ndarray, t0: int = 0) -> None:
        """Sample ``x`` (t, n_grid) into ``section[:, t0:t0 + t]`` and ``rays[:, t0:t0 + t]``."""
        if section.shape[0] * section.shape[2] + rays.shape[0] * rays.shape[2] \
                != self.n_points or section.shape[0] != self.n_stations \
                or t0 + x.shape[0] > section.shape[1] or t0 + x.shape[0] > rays.shape[1]:
            raise ValueError("the blocks do not fit the sampler's points or the steps")
        _sample_split(self.indptr, self.cols, self.weights, self.valid, x, section, rays,
                      int(t0))
