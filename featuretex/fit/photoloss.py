"""The fit's photometric loss in one compiled pass: sRGB-encoded masked L1 and SSIM, with gradients.

Same definitions as featuretex.fit.losses (srgb_encode_leaky, masked_l1, masked_ssim: Gaussian
window sigma 1.5 over 11 taps, K1 = 0.01, K2 = 0.03, 'valid' map, both images zeroed outside the
mask), which stay the plain-torch reference the tests compare this with. Why compiled: in torch
the encoding, the five blurred moments and the SSIM formula are ~60 elementwise passes over the
batch plus their autograd twins, all memory-bound; here a few compiled loops do the same work.
The SSIM gradient is the analytic one: with
A1 = 2 mx my + c1, A2 = 2 cxy + c2, B1 = mx^2 + my^2 + c1, B2 = vx + vy + c2, D = B1 B2, S = A1 A2 / D,
  dS/dmx = 2 (my (A2 - A1) - mx S (B2 - B1)) / D,  dS/dmxy = 2 A1 / D,  dS/dmxx = dS/dmyy = -S B1 / D
(and dS/dmy by symmetry), taken back through the adjoint of the separable blur.
"""

from __future__ import annotations

import numpy as np
import torch
from numba import njit, prange

from featuretex.compiled import CACHE, match_torch_threads
from featuretex.fit.losses import SSIM_K1, SSIM_K2, gaussian_kernel
from featuretex.scene.colour import _A, _THRESH_LIN


@njit(cache=CACHE, inline="always")
def _encode(x: np.float32) -> tuple[np.float32, np.float32]:  # pragma: no cover - compiled
    """srgb_encode_leaky at one linear value, and its derivative (float32, as the torch reference)."""
    one, zero = np.float32(1.0), np.float32(0.0)
    if x < zero or x > one:                     # the leak: slope 1 outside [0, 1]
        c = min(max(x, zero), one)
        e = np.float32(12.92) * c if c <= _THRESH_LIN else np.float32(1.0 + _A) * c ** np.float32(1.0 / 2.4) - np.float32(_A)
        return e + (x - c), one
    if x <= _THRESH_LIN:
        return np.float32(12.92) * x, np.float32(12.92)
    p = x ** np.float32(1.0 / 2.4)
    return np.float32(1.0 + _A) * p - np.float32(_A), np.float32((1.0 + _A) / 2.4) * p / x


@njit(cache=CACHE, inline="always")
def _sizes(img: np.ndarray, k: np.ndarray) -> tuple[int, int, int, int, int, int, int, int]:  # pragma: no cover
    """B, C, h, w of the images; taps n, radius r and the valid map's hv, wv of the window k."""
    B, C, h, w = img.shape
    n = k.shape[0]
    r = (n - 1) // 2
    return B, C, h, w, n, r, h - 2 * r, w - 2 * r


@njit(cache=CACHE, inline="always")
def _ssim_terms(st: np.ndarray, y: int, x: int, c1: np.float32, c2: np.float32):  # pragma: no cover
    """mx, my and the four factors A1, A2, B1, B2 of SSIM = A1 A2 / (B1 B2) at (y, x) of the moments
    st (5, hv, wv) = mx, my, mxx, myy, mxy."""
    mx, my = st[0, y, x], st[1, y, x]
    vx, vy, cxy = st[2, y, x] - mx * mx, st[3, y, x] - my * my, st[4, y, x] - mx * my
    return mx, my, 2 * mx * my + c1, 2 * cxy + c2, mx * mx + my * my + c1, vx + vy + c2


@njit(parallel=True, cache=CACHE, boundscheck=False)
def _forward(pred, targ, mask, k, c1, c2, pm, tm, dpm, dtm, stats, l1_part, ssim_part):  # pragma: no cover
    """Per plane (crop b, channel c) of the linear images pred, targ (B, C, h, w) float32: the
    masked encoded images pm, tm and the encoding's derivatives times the mask dpm, dtm (B, C, h, w);
    blurred moments stats (B, C, 5, h - 2r, w - 2r) = mx, my, mxx, myy, mxy; sums of |pm - tm| and
    of the SSIM map over the cropped mask, (B * C,) float64."""
    B, C, h, w, n, r, hv, wv = _sizes(pm, k)
    for q in prange(B * C):
        b, c = q // C, q % C
        P, T = pm[b, c], tm[b, c]
        l1 = 0.0
        for y in range(h):
            for x in range(w):
                if mask[b, y, x]:
                    P[y, x], dpm[b, c, y, x] = _encode(pred[b, c, y, x])
                    T[y, x], dtm[b, c, y, x] = _encode(targ[b, c, y, x])
                    l1 += abs(P[y, x] - T[y, x])
                else:
                    P[y, x] = T[y, x] = dpm[b, c, y, x] = dtm[b, c, y, x] = 0.0
        l1_part[q] = l1
        tmp = np.zeros((5, h, wv), np.float32)     # horizontal pass (x innermost: vectorised)
        for y in range(h):
            for i in range(n):
                kk = k[i]
                for x in range(wv):
                    a, t = P[y, x + i], T[y, x + i]
                    tmp[0, y, x] += kk * a
                    tmp[1, y, x] += kk * t
                    tmp[2, y, x] += kk * (a * a)
                    tmp[3, y, x] += kk * (t * t)
                    tmp[4, y, x] += kk * (a * t)
        st = stats[b, c]
        st[:] = 0.0
        for y in range(hv):                        # vertical pass
            for i in range(n):
                kk = k[i]
                for j in range(5):
                    for x in range(wv):
                        st[j, y, x] += kk * tmp[j, y + i, x]
        ss = 0.0
        for y in range(hv):
            for x in range(wv):
                if mask[b, y + r, x + r]:
                    _, _, A1, A2, B1, B2 = _ssim_terms(st, y, x, c1, c2)
                    ss += (A1 * A2) / (B1 * B2)
        ssim_part[q] = ss


@njit(parallel=True, cache=CACHE, boundscheck=False)
def _backward(mask, k, c1, c2, pm, tm, dpm, dtm, stats, a_l1, a_ssim, gpred, gtarg):  # pragma: no cover
    """gpred, gtarg (B, C, h, w) = d(a_l1 * sum|pm - tm| + a_ssim * sum S) / d(pred, targ), where
    dpm, dtm are the encoding's derivatives (times the mask)."""
    B, C, h, w, n, r, hv, wv = _sizes(pm, k)
    for q in prange(B * C):
        b, c = q // C, q % C
        st = stats[b, c]
        G = np.zeros((5, hv, wv), np.float32)       # a_ssim * dS / d(moment), on the cropped mask
        for y in range(hv):
            for x in range(wv):
                if mask[b, y + r, x + r]:
                    mx, my, A1, A2, B1, B2 = _ssim_terms(st, y, x, c1, c2)
                    D = B1 * B2
                    S = A1 * A2 / D
                    G[0, y, x] = a_ssim * 2 * (my * (A2 - A1) - mx * S * (B2 - B1)) / D
                    G[1, y, x] = a_ssim * 2 * (mx * (A2 - A1) - my * S * (B2 - B1)) / D
                    G[2, y, x] = G[3, y, x] = a_ssim * (-S * B1 / D)
                    G[4, y, x] = a_ssim * 2 * A1 / D
        U = np.zeros((5, h, wv), np.float32)         # adjoint of the vertical pass
        for y in range(hv):
            for i in range(n):
                kk = k[i]
                for j in range(5):
                    for x in range(wv):
                        U[j, y + i, x] += kk * G[j, y, x]
        A = np.zeros((5, h, w), np.float32)          # adjoint of the horizontal pass
        for j in range(5):
            for y in range(h):
                for i in range(n):
                    kk = k[i]
                    for x in range(wv):
                        A[j, y, x + i] += kk * U[j, y, x]
        P, T = pm[b, c], tm[b, c]
        for y in range(h):
            for x in range(w):
                p, t = P[y, x], T[y, x]
                d = p - t
                sgn = a_l1 if d > 0 else (-a_l1 if d < 0 else 0.0)
                gpred[b, c, y, x] = dpm[b, c, y, x] * (A[0, y, x] + 2 * p * A[2, y, x] + t * A[4, y, x] + sgn)
                gtarg[b, c, y, x] = dtm[b, c, y, x] * (A[1, y, x] + 2 * t * A[3, y, x] + p * A[4, y, x] - sgn)


class _PhotoLoss(torch.autograd.Function):
    @staticmethod
    def forward(ctx, pred: torch.Tensor, targ: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:  # type: ignore[override]
        B, C, h, w = pred.shape
        pred, targ = pred.detach().contiguous(), targ.detach().contiguous()
        pm, tm, dpm, dtm = (torch.empty(B, C, h, w) for _ in range(4))
        mask = mask.contiguous()
        m = mask.numpy()
        k = gaussian_kernel().numpy()
        r = (len(k) - 1) // 2
        c1, c2 = np.float32(SSIM_K1 ** 2), np.float32(SSIM_K2 ** 2)
        stats = torch.empty(B, C, 5, h - 2 * r, w - 2 * r)
        l1p, ssp = np.empty(B * C), np.empty(B * C)
        match_torch_threads(torch.get_num_threads())
        _forward(pred.numpy(), targ.numpy(), m, k, c1, c2, pm.numpy(), tm.numpy(), dpm.numpy(), dtm.numpy(),
                 stats.numpy(), l1p, ssp)
        n_l1 = max(float(m.sum()) * C, 1.0)
        n_ss = max(float(m[:, r:h - r, r:w - r].sum()) * C, 1.0)
        ctx.save_for_backward(mask, pm, tm, dpm, dtm, stats)
        ctx.consts = (k, c1, c2, n_l1, n_ss)
        return torch.tensor([l1p.sum() / n_l1, ssp.sum() / n_ss], dtype=torch.float32)

    @staticmethod
    def backward(ctx, grad: torch.Tensor):  # type: ignore[override]
        mask, pm, tm, dpm, dtm, stats = ctx.saved_tensors
        k, c1, c2, n_l1, n_ss = ctx.consts
        gp, gt = torch.empty_like(pm), torch.empty_like(pm)
        _backward(mask.numpy(), k, c1, c2, pm.numpy(), tm.numpy(), dpm.numpy(), dtm.numpy(),
                  stats.numpy(), np.float32(float(grad[0]) / n_l1), np.float32(float(grad[1]) / n_ss),
                  gp.numpy(), gt.numpy())
        return gp, gt, None


def photometric_loss(pred: torch.Tensor, target: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """(2,) [masked L1, masked SSIM] of the sRGB-encoded linear images pred, target (B, 3, h, w)
    over mask (B, h, w) bool, differentiable in both images; equal to
    [masked_l1(enc(pred), enc(target), mask), masked_ssim(enc(pred), enc(target), mask)]."""
    return _PhotoLoss.apply(pred.float(), target.float(), mask.bool())
