"""The probability that independent random parity flips cancel: exact or weighted, at any size.

The problem (what the Clifford estimate of :mod:`toposcout.compiler.clifford` reduces to). There
are M independent *mechanisms*; mechanism j fires with probability p_j and then flips the
checks in its *symptom* v_j (a set of the m checks, a vector of GF(2)^m). We want

    F = Pr[ the fired symptoms add up to zero ]   (every check passes).

It has an exact Fourier form (the piling-up lemma of Matsui, EUROCRYPT 1993, in its Fourier
reading: O'Donnell, *Analysis of Boolean Functions* (2014), chapter 1): with
c_j = 1 - 2 p_j,

    F = 2^-m  sum over u in GF(2)^m of  g(u),   g(u) = prod over j with u.v_j odd of c_j.

In the language of stabilizer states this is the familiar "fidelity = the average over the
stabilizer group of each element's expectation": u picks an element of the checked group and
g(u) is its expectation after the noise (each mechanism that anticommutes with it multiplies
it by c_j). Every g(u) is positive when all p_j < 1/2.

*Mechanisms* here may also carry a factor c_j > 1 (a "negative probability"): only log c_j
enters, so a Pauli channel that is not a product of independent flips is still exact (see
:func:`independent_flips`).

Two ways to compute it:

* **exact**, when the symptoms span a space of dimension r <= :data:`EXACT_RANK`: only the
  coordinates of u in that span matter, F = 2^-r sum over w in GF(2)^r of g(w), and
  log g(w) = -(A - W(w))/2 with A = sum_j a_j, a_j = -log c_j and W the Walsh-Hadamard
  transform of the a_j placed at their coordinates (one fast Walsh-Hadamard transform of size
  2^r: Fino & Algazi, IEEE Trans. Computers C-25 (1976)).
* **weighted** (importance sampling) above that: w is drawn from a product distribution
  q(w) = prod_i pi_i^{w_i} (1 - pi_i)^{1 - w_i} over the coordinates of a basis of heavy
  mechanisms (the m independent symptoms of largest a_j, chosen greedily: the greedy
  algorithm of a matroid), and F is 2^-r (the exact u = 0 term: g(0) = 1) plus the mean of
  2^-r g(w) / q(w) [w != 0]. The u = 0 term is kept exact because it is a spike that a product
  proposal rarely visits, and near the fully mixed floor (F close to 2^-r) it is a large
  part of F (a sampled spike would leave a low estimate with a small standard error). For a basis mechanism
  alone the best pi_i is c_i / (1 + c_i), which makes its factor constant; the pi_i are then
  refined by mean-field coordinate ascent on log g (Bishop, *Pattern Recognition and Machine
  Learning* (2006), section 10.1.1: logit pi_i = E[log g | w_i = 1] - E[log g | w_i = 0]
  under the product distribution), which also accounts for the non-basis mechanisms. The
  estimate is unbiased; its standard error is the sample standard deviation of the weights
  over sqrt(N), and the number of samples grows until it is at most ``rel_se`` times the
  estimate *and* Kong's effective sample size (sum w)^2 / sum w^2 (Kong, 1992; Owen, *Monte
  Carlo theory, methods and examples* (2013), section 9.3) is at least
  :data:`MIN_EFFECTIVE_SAMPLES`, so that one heavy weight cannot pass for a precise figure.

Weighted estimates of several independent parts merge exactly (:meth:`ParityEstimate.__add__`:
sums of weights and squared weights add, kept in log scale so that F = 1e-300 does not
underflow).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

__all__ = ["EXACT_RANK", "MIN_EFFECTIVE_SAMPLES", "ParityProblem", "ParityEstimate", "independent_flips",
           "estimate_cancellation"]

#: the largest span dimension computed exactly (a transform of 2^20 values: 8 MB, well under a second).
EXACT_RANK = 20
#: the smallest effective sample size a weighted estimate must reach before its standard error is trusted.
MIN_EFFECTIVE_SAMPLES = 100
_BATCH = 512
_MEAN_FIELD_STEPS = 40
_PI_MAX = 0.5 - 1e-9  # keeps 1 - 2 pi > 0, so the product over the other coordinates stays finite
_LOG_FLOOR = -700.0  # log c_j for c_j <= 0 (p_j >= 1/2: the mechanism randomises its checks)


def independent_flips(px: float, py: float, pz: float) -> tuple[float, float, float]:
    """Log-factors (log c_X, log c_Y, log c_Z) of three independent flips equal to the one-qubit
    Pauli channel (px, py, pz). Its Pauli eigenvalues are l_X = 1 - 2(py + pz),
    l_Y = 1 - 2(px + pz), l_Z = 1 - 2(px + py) (Nielsen & Chuang, section 8.3: a Pauli
    channel is diagonal in the Pauli basis); independent flips give l_X = c_Y c_Z,
    l_Y = c_X c_Z, l_Z = c_X c_Y, so log c_X = (log l_Y + log l_Z - log l_X) / 2 and so on.
    A log-factor above 0 (c > 1) is allowed: the channel is then not a product of
    independent flips (for example pure amplitude-damping twirls, pz = 0), but the Fourier
    form of F stays exact."""
    lx, ly, lz = 1 - 2 * (py + pz), 1 - 2 * (px + pz), 1 - 2 * (px + py)
    if min(lx, ly, lz) <= 0:
        raise ValueError(f"Pauli channel ({px}, {py}, {pz}) has a non-positive eigenvalue")
    gx, gy, gz = math.log(lx), math.log(ly), math.log(lz)
    return (gy + gz - gx) / 2, (gx + gz - gy) / 2, (gx + gy - gz) / 2


class ParityProblem:
    """Mechanisms as (symptom, log c): ``symptoms`` are Python ints (bit d = check d),
    ``log_factors`` the log c_j. Mechanisms with the same symptom are merged (their factors
    multiply), empty symptoms are dropped (they cannot fail a check). The symptoms are put in
    coordinates of a greedy heavy basis of their span (:attr:`rank` coordinates)."""

    def __init__(self, symptoms: Sequence[int], log_factors: Sequence[float]):
        merged: dict[int, float] = {}
        for v, g in zip(symptoms, log_factors):
            v = int(v)
            if v:
                merged[v] = merged.get(v, 0.0) + max(float(g), _LOG_FLOOR)
        vs = list(merged)
        self.log_c = np.array([merged[v] for v in vs], dtype=np.float64)
        order = np.argsort(self.log_c, kind="stable")  # most negative log c (heaviest) first
        pivots: dict[int, tuple[int, int]] = {}  # pivot bit -> (reduced vector, combination)
        for j in order:
            v, combo = _reduce(vs[j], pivots)
            if v:
                pivots[v.bit_length() - 1] = (v, combo ^ (1 << len(pivots)))
        self.rank = len(pivots)
        # coordinate i of a symptom is its share of basis vector i (inserted heavy-first)
        combos = [_reduce(v, pivots)[1] for v in vs]
        self.coords = np.array([[(c >> i) & 1 for i in range(self.rank)] for c in combos],
                               dtype=np.uint8).reshape(len(vs), self.rank)

    @property
    def mechanisms(self) -> int:
        return len(self.log_c)

    def no_fire_log_probability(self) -> float:
        """log of the probability that no mechanism fires (the "no error" term, a lower
        bound of F when every c_j <= 1)."""
        # 1 - p = (1 + c) / 2; a factor c > 1 (a "negative probability") counts as never firing
        return float(np.sum(np.log((1 + np.minimum(np.exp(self.log_c), 1.0)) / 2)))


def _reduce(v: int, pivots: dict[int, tuple[int, int]]) -> tuple[int, int]:
    """(residual, combination): ``v`` with every bit that has a pivot cleared by XOR with that
    pivot's vector (highest first; a pivot's vector has no bit above its pivot), and the mask of
    basis vectors those pivot vectors add up to. ``v`` is in the span when the residual is 0."""
    combo = residual = 0
    while v:
        top = v.bit_length() - 1
        if top in pivots:
            rv, rc = pivots[top]
            v ^= rv
            combo ^= rc
        else:
            residual |= 1 << top
            v ^= 1 << top
    return residual, combo


@dataclass
class ParityEstimate:
    """F (``value``) with its standard error; ``exact`` when computed by the transform (then
    ``se`` is 0). Weighted parts keep ``log_offset``, ``sum_w``, ``sum_w2`` (weights divided
    by exp(log_offset)) and ``samples`` so that parts merge exactly by ``+``."""

    value: float
    se: float
    exact: bool
    samples: int = 0
    effective_samples: float = 0.0
    log_offset: float = 0.0
    sum_w: float = 0.0
    sum_w2: float = 0.0
    rank: int = 0

    def __add__(self, other: "ParityEstimate") -> "ParityEstimate":
        if self.exact or other.exact:
            if self.exact and other.exact and math.isclose(self.value, other.value, rel_tol=1e-9, abs_tol=0.0):
                return self
            raise ValueError("exact parity figures are not merged with other parts")
        off = max(self.log_offset, other.log_offset)
        a, b = math.exp(self.log_offset - off), math.exp(other.log_offset - off)
        if self.rank != other.rank:
            raise ValueError("parts of two different parity problems are not merged")
        return _weighted(off, self.sum_w * a + other.sum_w * b, self.sum_w2 * a * a + other.sum_w2 * b * b,
                         self.samples + other.samples, self.rank)

    def to_dict(self) -> dict:
        return dict(self.__dict__)

    @classmethod
    def from_dict(cls, d: dict) -> "ParityEstimate":
        return cls(**d)


def _weighted(log_offset: float, sum_w: float, sum_w2: float, n: int, rank: int) -> ParityEstimate:
    mean = sum_w / n
    var = max(sum_w2 / n - mean * mean, 0.0)
    scale = math.exp(log_offset)
    ess = sum_w * sum_w / sum_w2 if sum_w2 > 0 else 0.0
    return ParityEstimate(mean * scale + 2.0**-rank, math.sqrt(var / n) * scale, False, n, ess, log_offset, sum_w,
                          sum_w2, rank)


def _fwht(h: np.ndarray) -> np.ndarray:
    """Fast Walsh-Hadamard transform (unnormalised) of a vector of length 2^r."""
    h = h.astype(np.float64, copy=True)
    n, step = h.shape[0], 1
    while step < n:
        v = h.reshape(-1, 2, step)
        x = v[:, 0, :].copy()
        v[:, 0, :] += v[:, 1, :]
        v[:, 1, :] = x - v[:, 1, :]
        step *= 2
    return h


def exact_cancellation(problem: ParityProblem) -> float:
    """F by one transform of size 2^rank (rank <= :data:`EXACT_RANK`)."""
    r = problem.rank
    if r > EXACT_RANK:
        raise ValueError(f"rank {r} is above the exact limit {EXACT_RANK}")
    if r == 0:
        return 1.0
    index = problem.coords.astype(np.int64) @ (np.int64(1) << np.arange(r, dtype=np.int64))
    a = -problem.log_c
    walsh = _fwht(np.bincount(index, weights=a, minlength=1 << r))
    log_g = -(a.sum() - walsh) / 2
    top = float(log_g.max())
    return float(math.exp(top) * np.exp(log_g - top).sum() / 2.0**r)


def _mean_field(problem: ParityProblem) -> np.ndarray:
    """pi_i of the product proposal (see the module docstring), clipped to (1e-12, 1/2)."""
    S = problem.coords.astype(np.float64)
    log_c = problem.log_c
    basis = np.zeros(problem.rank)
    single = S.sum(axis=1) == 1
    basis_of = S[single].argmax(axis=1)
    np.add.at(basis, basis_of, log_c[single])
    c = np.exp(np.minimum(basis, 0.0))
    pi = np.clip(c / (1 + c), 1e-12, _PI_MAX)
    for _ in range(_MEAN_FIELD_STEPS):
        lt = np.log(np.maximum(1 - 2 * pi, 1e-300))
        prod_all = np.exp(S @ lt)
        # E[log g | w_i = 1] - E[log g | w_i = 0] = sum over j containing i of log c_j * prod_{l != i} (1 - 2 pi_l)
        drive = (S * (log_c * prod_all)[:, None]).sum(axis=0) / np.exp(lt)
        target = 1.0 / (1.0 + np.exp(-np.clip(drive, -700, 700)))
        pi = np.clip(0.5 * pi + 0.5 * target, 1e-12, _PI_MAX)
    return pi


def weighted_cancellation(problem: ParityProblem, *, rel_se: float, max_samples: int, seed: int,
                          min_samples: int = 2048) -> ParityEstimate:
    """Importance-sampled F (see the module docstring): batches until the standard error is at
    most ``rel_se`` x F and the effective sample size is at least
    :data:`MIN_EFFECTIVE_SAMPLES`, or ``max_samples``."""
    r = problem.rank
    rng = np.random.default_rng(seed)
    pi = _mean_field(problem)
    log_pi, log_1mpi = np.log(pi), np.log1p(-pi)
    S_t = problem.coords.T.astype(np.float32)  # r x M
    log_c = problem.log_c
    offset = None
    sum_w = sum_w2 = 0.0
    n = 0
    while n < max_samples:
        b = min(_BATCH, max_samples - n)
        w = rng.random((b, r)) < pi
        parity = np.remainder(w.astype(np.float32) @ S_t, 2.0)
        log_v = parity.astype(np.float64) @ log_c - r * math.log(2.0) - np.where(w, log_pi, log_1mpi).sum(axis=1)
        log_v[~w.any(axis=1)] = -math.inf  # u = 0 is the exact term, added below
        top = float(log_v.max())
        if top == -math.inf:
            n += b
            continue
        if offset is None or top > offset:
            if offset is not None:
                shrink = math.exp(offset - top)
                sum_w, sum_w2 = sum_w * shrink, sum_w2 * shrink * shrink
            offset = top
        x = np.exp(log_v - offset)
        sum_w += float(x.sum())
        sum_w2 += float((x * x).sum())
        n += b
        if n >= min_samples:
            est = _weighted(offset, sum_w, sum_w2, n, r)
            if est.se <= rel_se * est.value and est.effective_samples >= MIN_EFFECTIVE_SAMPLES:
                break
    return _weighted(offset if offset is not None else 0.0, sum_w, sum_w2, max(n, 1), r)


def estimate_cancellation(problem: ParityProblem, *, rel_se: float = 0.05, max_samples: int = 2_000_000,
                          seed: int = 0) -> ParityEstimate:
    """Exact when the span is small enough, else weighted (see the module docstring)."""
    if problem.rank <= EXACT_RANK:
        return ParityEstimate(exact_cancellation(problem), 0.0, True)
    return weighted_cancellation(problem, rel_se=rel_se, max_samples=max_samples, seed=seed)
