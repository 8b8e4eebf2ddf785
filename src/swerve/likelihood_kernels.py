"""Compiled kernels of the likelihood (:mod:`swerve.likelihood`): each star's density under the
walkers' cell models, summed over its distance samples, with the gradient and Fisher information
in the cell means that the catalog-level emulator term needs, and that term's batched Cholesky.

Plain arrays in, plain arrays out: the packed star terms (``swerve.likelihood._Packed``), the
walkers' cell means, covariances and v_r densities. :func:`_run_kernels` is the entry point.
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np

from .fastmath import fast_exp, prefer_512

_LOG_2PI = math.log(2.0 * math.pi)


@nb.njit(fastmath=True, inline="always", cache=True)
def _term(a00, a10, a11, a20, a21, a22, u0, u1, u2, x00, x10, x11, x20, x21, x22, y0, y1, y2, wj):
    """One sample's weighted Gaussian ``w N(y; u, A + X)`` (without the (2π)^-3/2) and the
    pieces of its gradient: returns ``(p, p/det * b, p/det * adj(S))`` flattened, with
    ``b = adj(S)(y - u)``, i.e. ``(p, p S⁻¹(y - u), p S⁻¹)``. Adjugate inverse, no Cholesky,
    no log."""
    s00 = a00 + x00
    s10 = a10 + x10
    s11 = a11 + x11
    s20 = a20 + x20
    s21 = a21 + x21
    s22 = a22 + x22
    i00 = s11 * s22 - s21 * s21
    i10 = s20 * s21 - s10 * s22
    i20 = s10 * s21 - s11 * s20
    i11 = s00 * s22 - s20 * s20
    i21 = s10 * s20 - s00 * s21
    i22 = s00 * s11 - s10 * s10
    det = s00 * i00 + s10 * i10 + s20 * i20
    d0 = y0 - u0
    d1 = y1 - u1
    d2 = y2 - u2
    b0 = i00 * d0 + i10 * d1 + i20 * d2
    b1 = i10 * d0 + i11 * d1 + i21 * d2
    b2 = i20 * d0 + i21 * d1 + i22 * d2
    inv = 1.0 / det
    q = (d0 * b0 + d1 * b1 + d2 * b2) * inv
    p = wj * fast_exp(-0.5 * q) * math.sqrt(inv)
    pi = p * inv
    return p, pi * b0, pi * b1, pi * b2, pi * i00, pi * i10, pi * i11, pi * i20, pi * i21, pi * i22


@nb.njit(fastmath=True, inline="always", cache=True)
def _term_cond(u0, u1, u2, b1, b2, s11, s21, s22, x00, x10, x11, x20, x21, x22, y0, y1, y2, wj, dl, dv, k1, k2):
    """One sample's tangential density conditional on its v_r (without the (2π)^-1), for the
    histogram model; ``wj`` carries the sample's weight times its radial density.

    The cell's tangential components are ``u_⊥ = μ_⊥ + b (u_r - μ_r) + ε``, ``ε ~ N(0, S)``
    (``b``, ``S`` = s11, s21, s22: the regression on v_r and the conditional covariance of the
    cell Gaussian), and the sample's measurement ``m = u + e``, ``e ~ N(0, X)``. The residual
    ``r = m_⊥ - μ_⊥ - b (m_r - μ_r) = ε + e_⊥ - b e_r`` has covariance
    ``M = S + X_⊥⊥ - b X_r⊥ - X_⊥r bᵀ + b bᵀ X_rr`` and, given m_r, mean ``(b - κ) δ``
    (``κ`` = k1, k2: the regression of e_⊥ on e_r; ``δ`` = dl: the expected true v_r minus the
    measured one given the histogram), and near a bin edge ``(b - κ)(b - κ)ᵀ dv`` more
    covariance (``dv``: the variance of that difference given the histogram, less ``X_rr``).
    Exact for a histogram flat over the v_r error; near an edge the two moments are matched (the
    residual is then a mixture, not a Gaussian).

    Returns ``(p, p Jᵀ M⁻¹ r, p Jᵀ M⁻¹ J)`` flattened like :func:`_term`, with
    ``J = ∂r/∂μ = [b, -I]`` up to sign."""
    d0 = y0 - u0
    m11 = s11 + x11 - 2.0 * b1 * x10 + b1 * b1 * x00
    m21 = s21 + x21 - b1 * x20 - b2 * x10 + b1 * b2 * x00
    m22 = s22 + x22 - 2.0 * b2 * x20 + b2 * b2 * x00
    e1 = b1 - k1
    e2 = b2 - k2
    m11 += e1 * e1 * dv
    m21 += e1 * e2 * dv
    m22 += e2 * e2 * dv
    r1 = y1 - u1 - b1 * d0 - e1 * dl
    r2 = y2 - u2 - b2 * d0 - e2 * dl
    det = m11 * m22 - m21 * m21
    inv = 1.0 / det
    i11 = m22 * inv
    i21 = -m21 * inv
    i22 = m11 * inv
    z1 = i11 * r1 + i21 * r2
    z2 = i21 * r1 + i22 * r2
    q = r1 * z1 + r2 * z2
    p = wj * fast_exp(-0.5 * q) * math.sqrt(inv)
    return (p, -p * (b1 * z1 + b2 * z2), p * z1, p * z2,
            p * (b1 * b1 * i11 + 2.0 * b1 * b2 * i21 + b2 * b2 * i22), -p * (b1 * i11 + b2 * i21), p * i11,
            -p * (b1 * i21 + b2 * i22), p * i21, p * i22)


@nb.njit(parallel=True, fastmath=True, cache=True)
def _loglike_kernel(seg_cell, seg_start, seg_star, chunk, n_star, m0, m1, m2, c00, c10, c11, c20, c21, c22, w,
                    vstart, vcount, vbeta, vgamma, vgamma2, kap1, kap2, cond, lognorm, mu, sig, dens, out,
                    want_grad, want_fisher, grad, fisher, mix, mix_off):
    """out[w, i] = log sum_k w_ik N(m_ik; mu[w, c], sig[w, c] + C_ik), summed over each star's
    (star, cell) segments; sig holds the 6 lower-triangle entries (00, 10, 11, 20, 21, 22).
    One walker at a time, vectorised over a segment's samples, parallel over (walker, chunk of
    stars) pairs (``chunk``: segment indices that start a new group of whole stars). Used for
    fewer than :data:`_WALKER_BLOCK` walkers, :func:`_loglike_blocks` for the rest.

    With ``want_grad``, also the catalog's gradient of the log-likelihood with respect to every
    cell mean, ``grad[w, c] = sum_i sum_k r_ik S_ik^-1 (m_ik - mu_c)``, and its Fisher
    information ``fisher[w, c] = sum_i sum_k r_ik S_ik^-1`` (6 lower-triangle entries), with
    ``r_ik`` each sample's responsibility within its star (used by the catalog-level
    marginalisation of the emulator's error, :meth:`Likelihood.emulator_correction`).

    Gaussians are evaluated in linear space with the adjugate inverse (no log or Cholesky per
    sample); a star whose sum underflows is redone in log space by :func:`_star_logspace` (and
    left out of ``grad`` and ``fisher``).

    With ``cond = 1`` each sample's term is its radial density from the walker's v_r
    histogram, ``p̃ = Σ_q vbeta[j, q] dens[w, c, vstart[j] + q]`` (the histogram convolved with
    the sample's v_r error), times the Gaussian of its tangential components conditional on v_r
    (:func:`_term_cond`; ``δ`` from ``vgamma``, :func:`_vr_window`; ``kap1``, ``kap2`` the
    regressions of the sample's tangential errors on its v_r error); ``lognorm`` is the
    Gaussian constant (1.5 or 1 log 2π).

    With ``mix`` (a mixture with a background population, :mod:`swerve.background`), each
    star's contribution to ``grad`` and ``fisher`` is weighted by its membership
    ``1 / (1 + exp(mix_off[w, i] - out[w, i]))`` (``mix_off``: the log of the star's background
    density plus its log prior odds of being background, finite, (W, n_star)); ``out`` stays
    the hypervelocity-star term alone."""
    W = mu.shape[0]
    nseg = seg_cell.shape[0]
    nch = chunk.shape[0] - 1
    acc = np.zeros((W, n_star))
    gs = np.zeros((W, nseg if want_grad else 1, 9))
    for task in nb.prange(W * nch):
        wi = task // nch
        ch = task % nch
        for s in range(chunk[ch], chunk[ch + 1]):
            c = seg_cell[s]
            a00 = sig[wi, c, 0]
            a10 = sig[wi, c, 1]
            a11 = sig[wi, c, 2]
            a20 = sig[wi, c, 3]
            a21 = sig[wi, c, 4]
            a22 = sig[wi, c, 5]
            u0 = mu[wi, c, 0]
            u1 = mu[wi, c, 1]
            u2 = mu[wi, c, 2]
            b1 = a10 / a00
            b2 = a20 / a00
            s11 = a11 - b1 * a10
            s21 = a21 - b1 * a20
            s22 = a22 - b2 * a20
            tot = g0 = g1 = g2 = h00 = h10 = h11 = h20 = h21 = h22 = 0.0
            for j in range(seg_start[s], seg_start[s + 1]):
                if cond:
                    pr = 0.0
                    pg = 0.0
                    ph = 0.0
                    for q in range(vcount[j]):
                        dq = dens[wi, c, vstart[j] + q]
                        pr += vbeta[j, q] * dq
                        pg += vgamma[j, q] * dq
                        ph += vgamma2[j, q] * dq
                    dl = pg / pr if pr > 0.0 else 0.0
                    dv = ph / pr - dl * dl - c00[j] if pr > 0.0 else 0.0
                    t = _term_cond(u0, u1, u2, b1, b2, s11, s21, s22, c00[j], c10[j], c11[j], c20[j], c21[j],
                                   c22[j], m0[j], m1[j], m2[j], w[j] * pr, dl, dv, kap1[j], kap2[j])
                else:
                    t = _term(a00, a10, a11, a20, a21, a22, u0, u1, u2, c00[j], c10[j], c11[j], c20[j], c21[j],
                              c22[j], m0[j], m1[j], m2[j], w[j])
                tot += t[0]
                g0 += t[1]
                g1 += t[2]
                g2 += t[3]
                if want_fisher:
                    h00 += t[4]
                    h10 += t[5]
                    h11 += t[6]
                    h20 += t[7]
                    h21 += t[8]
                    h22 += t[9]
            acc[wi, seg_star[s]] += tot  # a star's segments all lie in one chunk: no race
            if want_grad:
                gs[wi, s, 0] = g0
                gs[wi, s, 1] = g1
                gs[wi, s, 2] = g2
                gs[wi, s, 3] = h00
                gs[wi, s, 4] = h10
                gs[wi, s, 5] = h11
                gs[wi, s, 6] = h20
                gs[wi, s, 7] = h21
                gs[wi, s, 8] = h22
    for wi in nb.prange(W):
        _finish(wi, acc[wi], gs[wi], seg_cell, seg_star, want_grad, want_fisher, lognorm, out, grad, fisher, mix,
                mix_off)


@nb.njit(fastmath=True, inline="always", cache=True)
def _membership(x):
    """``1 / (1 + exp(x))``: a star's membership from its log odds ``x`` of being background
    (clamped: the kernels are compiled with fastmath, which assumes no infinities)."""
    return 1.0 / (1.0 + math.exp(min(max(x, -700.0), 700.0)))


@nb.njit(fastmath=True, cache=True)
def _finish(wi, acc, gs, seg_cell, seg_star, want_grad, want_fisher, lognorm, out, grad, fisher, mix, mix_off):
    """One walker's per-star logs and its responsibility-weighted gradient and Fisher sums,
    from the per-star sums ``acc`` (n_star,) and per-segment sums ``gs`` (n_seg, 9); with
    ``mix``, each star's weighted by its membership (see :func:`_loglike_kernel`)."""
    for i in range(acc.shape[0]):
        if acc[i] > 1e-300:
            out[wi, i] = math.log(acc[i]) - lognorm
        else:
            out[wi, i] = np.nan  # recomputed in log space
    if want_grad:
        for s in range(seg_cell.shape[0]):
            i = seg_star[s]
            a = acc[i]
            if a > 1e-300:
                c = seg_cell[s]
                ia = 1.0 / a
                if mix:
                    ia *= _membership(mix_off[wi, i] - out[wi, i])
                for m in range(3):
                    grad[wi, c, m] += gs[s, m] * ia
                if want_fisher:
                    for m in range(6):
                        fisher[wi, c, m] += gs[s, 3 + m] * ia


#: walkers evaluated together by :func:`_loglike_blocks` (a compile-time constant: the inner
#: loop over them then fills whole vector registers; 16 measured fastest here, 8 and 32 slower)
_WALKER_BLOCK = 16
#: fewest walkers of a partial block worth padding to a whole one (see :func:`_run_kernels`)
_PAD_FROM = 5


@nb.njit(parallel=True, fastmath=True, cache=True)
def _loglike_blocks(seg_cell, seg_start, seg_star, chunk, n_star, m0, m1, m2, c00, c10, c11, c20, c21, c22, w,
                    vstart, vcount, vbeta, vgamma, vgamma2, kap1, kap2, cond, lognorm, mub, sigb, densb, out,
                    want_grad, want_fisher, grad, fisher, mix, mix_off):
    """:func:`_loglike_kernel` for blocks of :data:`_WALKER_BLOCK` walkers, vectorised over the
    walkers of a block (every sample meets 16 walkers in the vector registers; a segment holds
    only ~40 samples, too few to fill them), parallel over (block, chunk of stars) pairs.
    ``mub`` (n_blocks, n_cells, 3, B) and ``sigb`` (n_blocks, n_cells, 6, B) hold the walkers
    last, as does ``densb`` (n_blocks, n_cells, n_bins, B); ``out``, ``grad`` and ``fisher``
    are laid out as in :func:`_loglike_kernel` for the n_blocks × B walkers. Compiled for
    512-bit vectors where the CPU has them (:func:`swerve.fastmath.prefer_512`; 1.3× faster
    here than LLVM's default 256, benchmarks/RESULTS.md)."""
    B = _WALKER_BLOCK
    nseg = seg_cell.shape[0]
    nbk = mub.shape[0]
    nch = chunk.shape[0] - 1
    acc = np.zeros((nbk, n_star, B))
    gs = np.zeros((nbk, nseg if want_grad else 1, 9, B))
    for task in nb.prange(nbk * nch):
        prefer_512()
        bi = task // nch
        ch = task % nch
        tot = np.zeros(B)
        G = np.zeros((9, B))
        pr = np.zeros(B)
        pg = np.zeros(B)
        ph = np.zeros(B)
        b1 = np.zeros(B)
        b2 = np.zeros(B)
        s11 = np.zeros(B)
        s21 = np.zeros(B)
        s22 = np.zeros(B)
        for s in range(chunk[ch], chunk[ch + 1]):
            c = seg_cell[s]
            tot[:] = 0.0
            G[:, :] = 0.0
            for k in range(B):
                b1[k] = sigb[bi, c, 1, k] / sigb[bi, c, 0, k]
                b2[k] = sigb[bi, c, 3, k] / sigb[bi, c, 0, k]
                s11[k] = sigb[bi, c, 2, k] - b1[k] * sigb[bi, c, 1, k]
                s21[k] = sigb[bi, c, 4, k] - b1[k] * sigb[bi, c, 3, k]
                s22[k] = sigb[bi, c, 5, k] - b2[k] * sigb[bi, c, 3, k]
            for j in range(seg_start[s], seg_start[s + 1]):
                x00 = c00[j]
                x10 = c10[j]
                x11 = c11[j]
                x20 = c20[j]
                x21 = c21[j]
                x22 = c22[j]
                y0 = m0[j]
                y1 = m1[j]
                y2 = m2[j]
                wj = w[j]
                if cond:
                    v0 = vstart[j]
                    k1 = kap1[j]
                    k2 = kap2[j]
                    pr[:] = 0.0
                    pg[:] = 0.0
                    ph[:] = 0.0
                    for q in range(vcount[j]):
                        bq = vbeta[j, q]
                        gq = vgamma[j, q]
                        hq = vgamma2[j, q]
                        for k in range(B):
                            dq = densb[bi, c, v0 + q, k]
                            pr[k] += bq * dq
                            pg[k] += gq * dq
                            ph[k] += hq * dq
                    for k in range(B):
                        ok = pr[k] > 0.0
                        ipr = 1.0 / pr[k] if ok else 0.0
                        dl = pg[k] * ipr
                        dv = ph[k] * ipr - dl * dl - x00 if ok else 0.0
                        t = _term_cond(mub[bi, c, 0, k], mub[bi, c, 1, k], mub[bi, c, 2, k], b1[k], b2[k], s11[k],
                                       s21[k], s22[k], x00, x10, x11, x20, x21, x22, y0, y1, y2, wj * pr[k], dl, dv,
                                       k1, k2)
                        tot[k] += t[0]
                        for m in range(3):
                            G[m, k] += t[1 + m]
                        if want_fisher:  # loop-invariant
                            for m in range(3, 9):
                                G[m, k] += t[1 + m]
                elif want_fisher:
                    for k in range(B):
                        t = _term(sigb[bi, c, 0, k], sigb[bi, c, 1, k], sigb[bi, c, 2, k], sigb[bi, c, 3, k],
                                  sigb[bi, c, 4, k], sigb[bi, c, 5, k], mub[bi, c, 0, k], mub[bi, c, 1, k],
                                  mub[bi, c, 2, k], x00, x10, x11, x20, x21, x22, y0, y1, y2, wj)
                        tot[k] += t[0]
                        for m in range(9):
                            G[m, k] += t[1 + m]
                else:  # the same without the Fisher sums: a loop of its own (one loop with them behind the
                    # flag measured 1.2x slower for the whole call, benchmarks/RESULTS.md)
                    for k in range(B):
                        t = _term(sigb[bi, c, 0, k], sigb[bi, c, 1, k], sigb[bi, c, 2, k], sigb[bi, c, 3, k],
                                  sigb[bi, c, 4, k], sigb[bi, c, 5, k], mub[bi, c, 0, k], mub[bi, c, 1, k],
                                  mub[bi, c, 2, k], x00, x10, x11, x20, x21, x22, y0, y1, y2, wj)
                        tot[k] += t[0]
                        for m in range(3):
                            G[m, k] += t[1 + m]
            i = seg_star[s]
            for k in range(B):
                acc[bi, i, k] += tot[k]  # a star's segments all lie in one chunk: no race
            if want_grad:
                gs[bi, s] = G
    for bi in nb.prange(nbk):
        _finish_block(bi * B, acc[bi], gs[bi], seg_cell, seg_star, want_grad, want_fisher, lognorm, out, grad,
                      fisher, mix, mix_off)


@nb.njit(fastmath=True, cache=True)
def _finish_block(w0, acc, gs, seg_cell, seg_star, want_grad, want_fisher, lognorm, out, grad, fisher, mix,
                  mix_off):
    """:func:`_finish` for the :data:`_WALKER_BLOCK` walkers from ``w0`` at once, reading the
    block's sums ``acc`` (n_star, B) and ``gs`` (n_seg, 9, B) in their memory order."""
    B = acc.shape[1]
    for i in range(acc.shape[0]):
        for k in range(B):
            a = acc[i, k]
            out[w0 + k, i] = math.log(a) - lognorm if a > 1e-300 else np.nan  # nan: recomputed in log space
    if want_grad:
        nc = grad.shape[1]
        gb = np.zeros((nc, 9, B))
        ia = np.empty(B)
        for s in range(seg_cell.shape[0]):
            c = seg_cell[s]
            i = seg_star[s]
            for k in range(B):
                a = acc[i, k]
                ia[k] = 1.0 / a if a > 1e-300 else 0.0
            if mix:
                for k in range(B):
                    if ia[k] > 0.0:
                        ia[k] *= _membership(mix_off[w0 + k, i] - out[w0 + k, i])
            for m in range(9 if want_fisher else 3):
                for k in range(B):
                    gb[c, m, k] += gs[s, m, k] * ia[k]
        for k in range(B):
            for c in range(nc):
                for m in range(3):
                    grad[w0 + k, c, m] += gb[c, m, k]
                if want_fisher:
                    for m in range(6):
                        fisher[w0 + k, c, m] += gb[c, 3 + m, k]


@nb.njit(cache=True)
def _cell_gaussians_tri(y, n_cells, floor2):
    """Cell means ``mu`` (W, n_cells, 3) and the lower triangles ``tri`` (W, n_cells, 6: 00, 10,
    11, 20, 21, 22) of the cell covariances ``L Lᵀ + floor2 I`` from emulated summary vectors
    ``y`` (W, >= 9 n_cells), in one pass: what ``swerve.summaries.stats_to_gaussian`` and the
    velocity floor give, without numpy's batched 3 × 3 products (the statistics' order is
    ``swerve.summaries.STAT_NAMES``)."""
    W = y.shape[0]
    mu = np.empty((W, n_cells, 3))
    tri = np.empty((W, n_cells, 6))
    for w in range(W):
        for c in range(n_cells):
            j = 9 * c
            mu[w, c, 0] = y[w, j]
            mu[w, c, 1] = y[w, j + 1]
            mu[w, c, 2] = y[w, j + 2]
            l00 = math.exp(y[w, j + 3])
            l11 = math.exp(y[w, j + 4])
            l22 = math.exp(y[w, j + 5])
            l10 = y[w, j + 6]
            l20 = y[w, j + 7]
            l21 = y[w, j + 8]
            tri[w, c, 0] = l00 * l00 + floor2
            tri[w, c, 1] = l10 * l00
            tri[w, c, 2] = l10 * l10 + l11 * l11 + floor2
            tri[w, c, 3] = l20 * l00
            tri[w, c, 4] = l20 * l10 + l21 * l11
            tri[w, c, 5] = l20 * l20 + l21 * l21 + l22 * l22 + floor2
    return mu, tri


def _run_kernels(p, mu, tri, want_grad: bool, dens=None, want_fisher: bool | None = None, mix_off=None):
    """Per-star log-likelihoods (W, n_star), gradient (W, n_cells, 3) and Fisher information
    (W, n_cells, 6) of the packed star terms ``p`` (``swerve.likelihood._Packed``) for the
    walkers' cell Gaussians ``mu`` (W, n_cells, 3) and ``tri``
    (W, n_cells, 6) and v_r histogram densities ``dens`` (W, n_cells, n_bins; needed when
    ``p.cond``, else ignored): whole blocks of walkers by :func:`_loglike_blocks`, the rest by
    :func:`_loglike_kernel`; underflowed stars redone in log space. A last partial block of
    at least :data:`_PAD_FROM` walkers is padded to a whole one (a walker costs 3-4× less in a
    block, and emcee passes half an ensemble less the walkers proposed outside the prior).

    ``mix_off`` (W, n_star), optional: with a background population, each star's log background
    density plus its log prior odds of being background (:meth:`swerve.likelihood.Likelihood`);
    the gradient and Fisher sums are then weighted by each star's membership. The per-star
    logs returned are the hypervelocity-star term alone either way."""
    W, nc = mu.shape[0], mu.shape[1]
    if not p.cond:
        dens = np.ones((W, nc, 1))
    elif dens is None or dens.shape[:2] != (W, nc):
        raise ValueError("likelihood: this catalog's terms need the v_r histogram densities of every walker")
    if W % _WALKER_BLOCK >= _PAD_FROM:
        pad = _WALKER_BLOCK - W % _WALKER_BLOCK
        mu = np.concatenate([mu, np.repeat(mu[-1:], pad, axis=0)])
        tri = np.concatenate([tri, np.repeat(tri[-1:], pad, axis=0)])
        dens = np.concatenate([dens, np.repeat(dens[-1:], pad, axis=0)])
        if mix_off is not None:
            mix_off = np.concatenate([mix_off, np.repeat(mix_off[-1:], pad, axis=0)])
        return tuple(a[:W] for a in _run_kernels(p, mu, tri, want_grad, dens, want_fisher, mix_off))
    want_fisher = want_grad if want_fisher is None else bool(want_fisher and want_grad)
    lognorm = (1.5 - 0.5 * p.cond) * _LOG_2PI
    vr = (p.vstart, p.vcount, p.vbeta, p.vgamma, p.vgamma2, p.kap1, p.kap2, float(p.cond), lognorm)
    mix = mix_off is not None and want_grad
    if mix:
        mix_off = np.ascontiguousarray(np.clip(mix_off, -700.0, 700.0), dtype=float)
        if mix_off.shape != (W, p.n_star):
            raise ValueError(f"likelihood: mix_off: expected shape {(W, p.n_star)}, got {mix_off.shape}")
    else:
        mix_off = np.zeros((W, 1))
    out = np.empty((W, p.n_star))
    grad = np.zeros((W, nc, 3))
    fisher = np.zeros((W, nc, 6))
    B = _WALKER_BLOCK
    n = (W // B) * B
    if n:
        mub = np.ascontiguousarray(mu[:n].reshape(n // B, B, nc, 3).transpose(0, 2, 3, 1))
        sigb = np.ascontiguousarray(tri[:n].reshape(n // B, B, nc, 6).transpose(0, 2, 3, 1))
        densb = np.ascontiguousarray(dens[:n].reshape(n // B, B, nc, -1).transpose(0, 2, 3, 1))
        _loglike_blocks(p.seg_cell, p.seg_start, p.seg_star, p.chunk, p.n_star, *p.cols, *vr, mub, sigb, densb,
                        out[:n], want_grad, want_fisher, grad[:n], fisher[:n], mix, mix_off[:n])
    if n < W:
        _loglike_kernel(p.seg_cell, p.seg_start, p.seg_star, p.chunk, p.n_star, *p.cols, *vr, mu[n:], tri[n:],
                        np.ascontiguousarray(dens[n:]), out[n:], want_grad, want_fisher, grad[n:],
                        fisher[n:], mix, np.ascontiguousarray(mix_off[n:]))
    # underflow: a star far in the tail of this walker's model (a NaN makes the sum NaN: one cheap
    # pass over the array instead of a mask and a search on every call)
    for wi, i in (np.argwhere(np.isnan(out)) if np.isnan(out.sum()) else ()):
        out[wi, i] = _star_logspace(p.seg_cell, p.seg_start, p.seg_star, i, *p.cols, *vr, mu[wi], tri[wi],
                                    np.ascontiguousarray(dens[wi]))
    return out, grad, fisher



@nb.njit(cache=True)
def _star_logspace(seg_cell, seg_start, seg_star, i, m0, m1, m2, c00, c10, c11, c20, c21, c22, w,
                   vstart, vcount, vbeta, vgamma, vgamma2, kap1, kap2, cond, lognorm, mu, sig, dens):
    """log-likelihood of star i for one walker, in log space (for sums that underflow)."""
    best = -np.inf
    vals = []
    for s in range(seg_cell.shape[0]):
        if seg_star[s] != i:
            continue
        c = seg_cell[s]
        for j in range(seg_start[s], seg_start[s + 1]):
            S = np.empty((3, 3))
            S[0, 0] = sig[c, 0] + c00[j]
            S[1, 0] = S[0, 1] = sig[c, 1] + c10[j]
            S[1, 1] = sig[c, 2] + c11[j]
            S[2, 0] = S[0, 2] = sig[c, 3] + c20[j]
            S[2, 1] = S[1, 2] = sig[c, 4] + c21[j]
            S[2, 2] = sig[c, 5] + c22[j]
            d = np.array([m0[j] - mu[c, 0], m1[j] - mu[c, 1], m2[j] - mu[c, 2]])
            if cond:  # the histogram model (see _term_cond), in log space
                pr = 0.0
                pg = 0.0
                ph = 0.0
                for q in range(vcount[j]):
                    pr += vbeta[j, q] * dens[c, vstart[j] + q]
                    pg += vgamma[j, q] * dens[c, vstart[j] + q]
                    ph += vgamma2[j, q] * dens[c, vstart[j] + q]
                if pr <= 0.0:
                    continue
                dl = pg / pr
                dv = ph / pr - dl * dl - c00[j]
                b1 = sig[c, 1] / sig[c, 0]
                b2 = sig[c, 3] / sig[c, 0]
                e1 = b1 - kap1[j]
                e2 = b2 - kap2[j]
                M = np.empty((2, 2))
                M[0, 0] = sig[c, 2] - b1 * sig[c, 1] + c11[j] - 2 * b1 * c10[j] + b1 * b1 * c00[j] + e1 * e1 * dv
                M[1, 0] = M[0, 1] = (sig[c, 4] - b1 * sig[c, 3] + c21[j] - b1 * c20[j] - b2 * c10[j] + b1 * b2 * c00[j]
                                     + e1 * e2 * dv)
                M[1, 1] = sig[c, 5] - b2 * sig[c, 3] + c22[j] - 2 * b2 * c20[j] + b2 * b2 * c00[j] + e2 * e2 * dv
                r = np.array([d[1] - b1 * d[0] - e1 * dl, d[2] - b2 * d[0] - e2 * dl])
                L2 = np.linalg.cholesky(M)
                y2 = np.linalg.solve(L2, r)
                vals.append(math.log(w[j] * pr) - 0.5 * np.sum(y2 * y2) - math.log(L2[0, 0] * L2[1, 1]))
                best = max(best, vals[-1])
                continue
            L = np.linalg.cholesky(S)
            y = np.linalg.solve(L, d)
            v = math.log(w[j]) - 0.5 * np.sum(y * y) - math.log(L[0, 0] * L[1, 1] * L[2, 2])
            vals.append(v)
            best = max(best, v)
    if best == -np.inf:
        return -np.inf
    acc = 0.0
    for v in vals:
        acc += math.exp(v - best)
    return best + math.log(acc) - lognorm


@nb.njit(parallel=True, cache=True)
def _half_quad_minus_logdet(B, c):
    """``½ cᵀ B⁻¹ c − ½ log det B`` for each of a batch of symmetric positive-definite
    matrices B (W, n, n) and vectors c (W, n): Cholesky factor in place of a copy, forward
    substitution (a batched LAPACK call spends more on its per-matrix overhead than on the
    arithmetic at n = 45). Compared with numpy in ``tests/test_likelihood.py``."""
    W, n, _ = B.shape
    res = np.empty(W)
    for w in nb.prange(W):
        L = B[w].copy()
        y = c[w].copy()
        logdet = 0.0
        for j in range(n):
            d = L[j, j]
            for k in range(j):
                d -= L[j, k] * L[j, k]
            if not d > 0.0:
                res[w] = np.nan
                break
            d = math.sqrt(d)
            L[j, j] = d
            logdet += 2.0 * math.log(d)
            for i in range(j + 1, n):
                v = L[i, j]
                for k in range(j):
                    v -= L[i, k] * L[j, k]
                L[i, j] = v / d
            v = y[j]
            for k in range(j):
                v -= L[j, k] * y[k]
            y[j] = v / d
        else:
            q = 0.0
            for j in range(n):
                q += y[j] * y[j]
            res[w] = 0.5 * q - 0.5 * logdet
    return res
