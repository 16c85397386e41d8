"""An independent horizon finder built only from scipy, for side-by-side benchmarks.

Nothing here imports Penumbra's numerics: the fields are interpolated with a tensor-product cubic
B-spline over the grid (scipy.ndimage.spline_filter + map_coordinates), the metric derivatives
are fourth-order centred differences on the grid (interpolated the same way), the surface is
r = h(theta, phi) in real harmonics built from scipy.special.sph_harm_y, the Cartesian
derivatives of the level set F = r - h come from fourth-order finite differences of F, and the
harmonic coefficients are solved for with scipy.optimize.least_squares (its own finite-difference
Jacobian). The expansion is written as D_i s^i - K + K_ij s^i s^j with
D_i s^i = d_i s^i + (1/2) gamma^jk d_i gamma_jk s^i, s^i = gamma^ij d_j F / |dF| (sign
K = -nabla_mu n^mu, as in docs/references.md).

ADM input only: a dict of gamma_xx ... K_zz arrays on a uniform vertex-centred grid.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage, optimize
from scipy.special import sph_harm_y

COMPONENTS = ("xx", "xy", "xz", "yy", "yz", "zz")
_PAIRS = ((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2))


def _sym(c):
    """(6, N) -> (N, 3, 3)."""
    out = np.empty((c.shape[1], 3, 3))
    for k, (i, j) in enumerate(_PAIRS):
        out[:, i, j] = out[:, j, i] = c[k]
    return out


class SplineFields:
    """gamma, d gamma and K anywhere inside the grid, by cubic B-splines of grid arrays."""

    def __init__(self, fields: dict, origin, spacing):
        self.origin = np.asarray(origin, float)
        self.h = float(spacing)
        w = np.array([1 / 12, -2 / 3, 0.0, 2 / 3, -1 / 12]) / self.h
        arrays = []
        for c in COMPONENTS:
            arrays.append(np.asarray(fields["gamma_" + c], float))
        for axis in range(3):
            for c in COMPONENTS:
                g = np.asarray(fields["gamma_" + c], float)
                d = sum(wk * np.roll(g, 2 - k, axis=axis) for k, wk in enumerate(w) if wk)
                arrays.append(d)  # wrong only within 2 nodes of the faces, never reached below
        for c in COMPONENTS:
            arrays.append(np.asarray(fields["K_" + c], float))
        self.coeffs = [ndimage.spline_filter(a, order=3, mode="mirror") for a in arrays]

    def __call__(self, x: np.ndarray):
        idx = ((x - self.origin) / self.h).T
        v = np.array([ndimage.map_coordinates(c, idx, order=3, prefilter=False, mode="mirror") for c in self.coeffs])
        gamma = _sym(v[0:6])
        dgamma = np.stack([_sym(v[6 + 6 * a: 12 + 6 * a]) for a in range(3)], axis=1)  # [n, k, i, j]
        return gamma, dgamma, _sym(v[24:30])


def real_harmonics(lmax: int, theta, phi) -> np.ndarray:
    """(N, (lmax+1)^2) orthonormal real harmonics (any consistent real basis will do)."""
    cols = []
    for l in range(lmax + 1):
        for m in range(-l, l + 1):
            y = sph_harm_y(l, abs(m), theta, phi)
            if m == 0:
                cols.append(y.real)
            elif m > 0:
                cols.append(np.sqrt(2) * y.real)
            else:
                cols.append(np.sqrt(2) * y.imag)
    return np.stack(cols, axis=1)


def _angles(x):
    r = np.linalg.norm(x, axis=-1)
    theta = np.arccos(np.clip(x[..., 2] / r, -1, 1))
    phi = np.mod(np.arctan2(x[..., 1], x[..., 0]), 2 * np.pi)
    return r, theta, phi


class PeerFinder:
    """Least-squares solve of Theta = 0 at Gauss-Legendre x uniform nodes."""

    def __init__(self, fields: SplineFields, centre, lmax: int):
        self.f = fields
        self.c = np.asarray(centre, float)
        self.lmax = lmax
        nt = lmax + 2
        x, _ = np.polynomial.legendre.leggauss(nt)
        th = np.arccos(x)
        ph = (np.arange(2 * nt) + 0.5) * np.pi / nt
        self.theta = np.repeat(th, 2 * nt)
        self.phi = np.tile(ph, nt)
        self.dirs = np.stack([np.sin(self.theta) * np.cos(self.phi), np.sin(self.theta) * np.sin(self.phi),
                              np.cos(self.theta)], axis=1)

    def level(self, a, x):
        r, t, p = _angles(x - self.c)
        shape = r.shape
        return r - (real_harmonics(self.lmax, t.ravel(), p.ravel()) @ a).reshape(shape)

    def expansion(self, a) -> np.ndarray:
        h = real_harmonics(self.lmax, self.theta, self.phi) @ a
        x = self.c + h[:, None] * self.dirs
        eps = 1e-3 * float(np.mean(h))
        e = np.eye(3) * eps
        # Fourth-order differences of F: offsets (-2, -1, 1, 2) along one axis or two.
        st1 = {-2: 1 / 12, -1: -2 / 3, 1: 2 / 3, 2: -1 / 12}
        st2 = {-2: -1 / 12, -1: 4 / 3, 0: -5 / 2, 1: 4 / 3, 2: -1 / 12}
        offsets, keys = [], []
        for i in range(3):
            for k in (-2, -1, 0, 1, 2):
                offsets.append(k * e[i]); keys.append(("d", i, k))
        for i in range(3):
            for j in range(i + 1, 3):
                for ki in (-2, -1, 1, 2):
                    for kj in (-2, -1, 1, 2):
                        offsets.append(ki * e[i] + kj * e[j]); keys.append(("m", i, j, ki, kj))
        pts = x[:, None, :] + np.asarray(offsets)[None]
        F = self.level(a, pts)
        col = {k: F[:, n] for n, k in enumerate(keys)}
        dF = np.stack([sum(w * col[("d", i, k)] for k, w in st1.items()) / eps for i in range(3)], axis=1)
        ddF = np.empty((x.shape[0], 3, 3))
        for i in range(3):
            ddF[:, i, i] = sum(w * col[("d", i, k)] for k, w in st2.items()) / eps**2
            for j in range(i + 1, 3):
                v = sum(st1[ki] * st1[kj] * col[("m", i, j, ki, kj)] for ki in st1 for kj in st1) / eps**2
                ddF[:, i, j] = ddF[:, j, i] = v
        gamma, dgamma, K = self.f(x)
        gi = np.linalg.inv(gamma)
        Fu = np.einsum("nij,nj->ni", gi, dF)
        u = np.sqrt(np.einsum("ni,ni->n", Fu, dF))
        s = Fu / u[:, None]
        dgi = -np.einsum("nac,nkcd,ndb->nkab", gi, dgamma, gi)  # d_k gamma^ab
        du = (np.einsum("nkab,na,nb->nk", dgi, dF, dF) + 2 * np.einsum("nab,na,nbk->nk", gi, dF, ddF)) / (2 * u[:, None])
        div_s = (np.einsum("niij,nj->n", dgi, dF) + np.einsum("nij,nij->n", gi, ddF)) / u \
            - np.einsum("ni,ni->n", Fu, du) / u**2
        div_s += 0.5 * np.einsum("njk,nijk,ni->n", gi, dgamma, s)
        trK = np.einsum("nij,nij->n", gi, K)
        return div_s - trK + np.einsum("nij,ni,nj->n", K, s, s)

    def solve(self, radius: float):
        a0 = np.zeros((self.lmax + 1) ** 2)
        a0[0] = radius * np.sqrt(4 * np.pi)
        return optimize.least_squares(self.expansion, a0, xtol=1e-12, ftol=1e-12, gtol=1e-12).x

    def area(self, a) -> float:
        n = 2 * self.lmax + 2
        x, w = np.polynomial.legendre.leggauss(n)
        th = np.repeat(np.arccos(x), 2 * n)
        ph = np.tile((np.arange(2 * n) + 0.5) * np.pi / n, n)
        wt = np.repeat(w, 2 * n) * np.pi / n
        d = 1e-5

        def X(t, p):
            h = real_harmonics(self.lmax, t, p) @ a
            return self.c + h[:, None] * np.stack([np.sin(t) * np.cos(p), np.sin(t) * np.sin(p), np.cos(t)], axis=1)

        Xt = (X(th + d, ph) - X(th - d, ph)) / (2 * d)
        Xp = (X(th, ph + d) - X(th, ph - d)) / (2 * d)
        g = self.f(X(th, ph))[0]
        q = [np.einsum("ni,nij,nj->n", A, g, B) for A, B in ((Xt, Xt), (Xt, Xp), (Xp, Xp))]
        return float(np.sum(wt * np.sqrt(q[0] * q[2] - q[1] ** 2) / np.sin(th)))
