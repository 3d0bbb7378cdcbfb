"""Block-wise exponential sums: the O(N) engine under every fit (no N×P design matrix).

A record y_n (n = 0…N−1) is cut into K blocks of B samples (B ≈ √N) plus a short tail.
The projection Σ y_n e^{−j2πx n} then costs one matrix product of the K×B block matrix
with the cos/sin of one block (memory-bound, one pass over the data) and K complex block
phases. Gram matrices come from closed-form geometric (Dirichlet) sums, so the cos/sin of
the whole record are never evaluated.
"""

from __future__ import annotations

import math

import numpy as np

TWO_PI = 2.0 * math.pi


def block_size(n: int) -> int:
    """Samples per block: about √N, which balances the block and block-phase work."""
    return max(1, math.isqrt(max(n, 1)))


def _turns(x: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Phase in radians of x (cycles per sample) times n, reduced to one turn first."""
    return TWO_PI * np.mod(np.multiply.outer(n, x), 1.0)


def project(
    records: np.ndarray,
    cycles_per_sample: np.ndarray,
    start_phase: np.ndarray,
    weighted: bool = False,
) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Projections of each record onto e^{−jθ_f,n}, θ_f,n = φ_f + 2π x_f n, for every f.

    records: (M, N) float64. Returns (S, sums, W): S (M, F) complex = Σ y e^{−jθ},
    sums (M,) = Σ y, and when ``weighted`` W (M, F) = Σ y (n/N) e^{−jθ} (for the
    frequency-free fit), else None.
    """
    m, n = records.shape
    x = np.asarray(cycles_per_sample, dtype=float)
    f = x.size
    b = block_size(n)
    k = n // b
    head = records[:, : k * b].reshape(m, k, b)
    idx = np.arange(b, dtype=float)
    angle = _turns(x, idx)  # (B, F)
    cols = [np.cos(angle), np.sin(angle)]
    if weighted:
        cols += [np.cos(angle) * idx[:, None], np.sin(angle) * idx[:, None]]
    kernel = np.concatenate([*cols, np.ones((b, 1))], axis=1)  # (B, 2F[+2F]+1)
    blocks = head @ kernel  # (M, K, cols)
    per_block = blocks[..., :f] - 1j * blocks[..., f : 2 * f]  # Σ_b y e^{−j2πx b}
    block_start = np.arange(k, dtype=float) * b
    block_phase = np.exp(-1j * _turns(x, block_start))  # (K, F)
    total = np.einsum("mkf,kf->mf", per_block, block_phase)
    sums = blocks[..., -1].sum(axis=1)
    weighted_total = None
    if weighted:
        per_block_n = blocks[..., 2 * f : 3 * f] - 1j * blocks[..., 3 * f : 4 * f]
        weighted_total = np.einsum(
            "mkf,kf->mf", per_block_n + block_start[None, :, None] * per_block, block_phase
        )
    if k * b < n:
        tail = records[:, k * b :]
        tail_n = np.arange(k * b, n, dtype=float)
        tail_exp = np.exp(-1j * _turns(x, tail_n))  # (r, F)
        total = total + tail @ tail_exp
        sums = sums + tail.sum(axis=1)
        if weighted_total is not None:
            weighted_total = weighted_total + (tail * tail_n) @ tail_exp
    phase = np.exp(-1j * np.asarray(start_phase, dtype=float))
    total = total * phase
    if weighted_total is not None:
        weighted_total = weighted_total * phase / n
    return total, sums, weighted_total


def exp_sum(n: int, cycles_per_sample: np.ndarray, start_phase: np.ndarray) -> np.ndarray:
    """Σ_{n=0}^{N−1} e^{j(φ + 2π x n)} in closed form (Dirichlet kernel), elementwise."""
    x = np.asarray(cycles_per_sample, dtype=float)
    reduced = x - np.round(x)
    half = math.pi * reduced
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(reduced == 0.0, float(n), np.sin(half * n) / np.sin(half))
    return ratio * np.exp(1j * (np.asarray(start_phase, dtype=float) + half * (n - 1)))


def weighted_exp_sums(
    n: int, cycles_per_sample: float, start_phase: float, max_power: int
) -> np.ndarray:
    """Σ_n (n/N)^p e^{j(φ + 2π x n)} for p = 0…max_power, block-wise in O(√N).

    With n = kB + b, (kB + b)^p expands binomially, so one sum over the B in-block
    offsets and one over the K block starts give every power.
    """
    b = block_size(n)
    k = n // b
    x = float(cycles_per_sample)
    offsets = np.arange(b, dtype=float)
    starts = np.arange(k, dtype=float) * b
    inner = np.exp(1j * _turns(np.array([x]), offsets))[:, 0]
    outer = np.exp(1j * _turns(np.array([x]), starts))[:, 0]
    out = np.zeros(max_power + 1, dtype=complex)
    inner_p = [np.sum(offsets**q * inner) for q in range(max_power + 1)]
    outer_p = [np.sum(starts**r * outer) for r in range(max_power + 1)]
    for p in range(max_power + 1):
        out[p] = sum(math.comb(p, q) * outer_p[p - q] * inner_p[q] for q in range(p + 1))
    if k * b < n:
        tail = np.arange(k * b, n, dtype=float)
        tail_exp = np.exp(1j * _turns(np.array([x]), tail))[:, 0]
        out += np.array([np.sum(tail**p * tail_exp) for p in range(max_power + 1)])
    scale = float(n) ** -np.arange(max_power + 1, dtype=float)
    return out * scale * np.exp(1j * start_phase)


def sine_gram(n: int, cycles_per_sample: np.ndarray, start_phase: np.ndarray) -> np.ndarray:
    """Gram matrix DᵀD of the columns [cos θ_1, sin θ_1, …, cos θ_F, sin θ_F, 1], closed form."""
    x = np.asarray(cycles_per_sample, dtype=float)
    phi = np.asarray(start_phase, dtype=float)
    f = x.size
    diff = exp_sum(n, x[:, None] - x[None, :], phi[:, None] - phi[None, :])
    summ = exp_sum(n, x[:, None] + x[None, :], phi[:, None] + phi[None, :])
    single = exp_sum(n, x, phi)
    gram = np.empty((2 * f + 1, 2 * f + 1))
    cc = 0.5 * (diff.real + summ.real)
    ss = 0.5 * (diff.real - summ.real)
    cs = 0.5 * (summ.imag - diff.imag)  # Σ cos θ_i sin θ_j
    gram[0 : 2 * f : 2, 0 : 2 * f : 2] = cc
    gram[1 : 2 * f : 2, 1 : 2 * f : 2] = ss
    gram[0 : 2 * f : 2, 1 : 2 * f : 2] = cs
    gram[1 : 2 * f : 2, 0 : 2 * f : 2] = cs.T
    gram[-1, 0 : 2 * f : 2] = gram[0 : 2 * f : 2, -1] = single.real
    gram[-1, 1 : 2 * f : 2] = gram[1 : 2 * f : 2, -1] = single.imag
    gram[-1, -1] = float(n)
    return gram


def residual_sum_squares(
    records: np.ndarray,
    cycles_per_sample: np.ndarray,
    start_phase: np.ndarray,
    cos_coef: np.ndarray,
    sin_coef: np.ndarray,
    offset: np.ndarray,
) -> np.ndarray:
    """Σ (y − model)² evaluated directly, block-wise (second pass, no cancellation).

    cos_coef, sin_coef: (M, F); offset: (M,).
    """
    m, n = records.shape
    x = np.asarray(cycles_per_sample, dtype=float)
    b = block_size(n)
    k = n // b
    phasor = (cos_coef - 1j * sin_coef) * np.exp(1j * np.asarray(start_phase))  # (M, F)
    inner = np.exp(1j * _turns(x, np.arange(b, dtype=float)))  # (B, F)
    starts = np.exp(1j * _turns(x, np.arange(k, dtype=float) * b))  # (K, F)
    u = phasor[:, None, :] * starts[None, :, :]  # (M, K, F)
    model = u.real @ inner.real.T - u.imag @ inner.imag.T  # (M, K, B)
    head = records[:, : k * b].reshape(m, k, b)
    resid = head - model - offset[:, None, None]
    rss = np.einsum("mkb,mkb->m", resid, resid)
    if k * b < n:
        tail_n = np.arange(k * b, n, dtype=float)
        tail_exp = np.exp(1j * _turns(x, tail_n))  # (r, F)
        tail_model = (phasor @ tail_exp.T).real  # (M, r)
        tail_resid = records[:, k * b :] - tail_model - offset[:, None]
        rss = rss + np.einsum("mr,mr->m", tail_resid, tail_resid)
    return rss
