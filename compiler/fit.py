"""Fitting a model's angles: an exact fast evaluator of the ansatz family and its optimiser.

The circuit of :mod:`toposcout.compiler.ansatz` is, per layer, a diagonal block
``D = prod_S exp(-i θ_S Z_S)`` followed by one rotation ``u(θ, φ, λ)`` per qubit, after a
Hadamard on every qubit. On basis state ``x`` the block multiplies by ``exp(i φ(x))`` with

    φ(x) = - sum_S θ_S (-1)^{popcount(x & mask_S)},

which is the (unnormalised) Walsh-Hadamard transform of the sparse vector ``c[mask_S] = -θ_S``.
So the state is a phase vector (one transform, O(n 2^n)) and n single-qubit rotations applied
to a reshaped tensor (O(n 2^n)); no general simulator is in the loop.

Gradients of every parameter come from the adjoint method (reverse pass over the same
operations with their inverses; the costate is ``λ = dL/dp ⊙ ψ``): single-qubit gates give a
2x2 environment per qubit, the diagonal block's gradient is one more Walsh-Hadamard transform,
so a gradient costs a small multiple of one evaluation.

Losses (``p`` = the circuit's exact distribution, little-endian over ``model.variables``):

* ``kl``: KL(target ‖ p) in nats, target = the normalised product of the model's factors.
* ``mmd``: the unbiased estimate of MMD² (Gretton et al., JMLR 13 (2012), eq. 3) between ``p``
  and the samples ``y_1..y_m``, with ``p``'s side exact:
  ``p^T K p - (2/m) sum_j (K p)(y_j) + 1/(m(m-1)) sum_{i≠j} k(y_i, y_j)``; the kernel is the mean
  of Gaussian kernels ``exp(-h(x, y) / (2σ²))`` over the Hamming distance ``h`` (= squared
  Euclidean distance of 0/1 vectors) for the bandwidths σ (default ``MMD_BANDWIDTHS``). Each
  is a tensor product of 2x2 matrices ``[[1, r], [r, 1]]`` with ``r = exp(-1/(2σ²))``, so ``K p``
  also costs O(n 2^n).

Optimisers: L-BFGS-B (scipy) by default, or Adam (Kingma & Ba, 2015); ``restarts`` seeded
random starts; reproducible with ``seed``. Exact for at most :data:`MAX_FIT_VARIABLES` variables.

Examples:
    >>> from toposcout.compiler.model import parse_model
    >>> m = parse_model({"variables": ["a", "b"], "cliques": [["a", "b"]],
    ...                  "factors": [{"scope": ["a", "b"], "values": [3, 1, 1, 3]}]})
    >>> r = fit_model(m, restarts=1, seed=0)
    >>> r.loss < 1e-8, sorted(r.parameters["terms"])
    (True, ['a', 'a,b', 'b'])
"""

from __future__ import annotations

import hashlib
import json
import math
import time
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from toposcout.compiler.ansatz import FAMILIES, Ansatz, build_ansatz
from toposcout.compiler.errors import CapacityError, ModelError
from toposcout.compiler.metrics import MMD_BANDWIDTHS, kl_divergence
from toposcout.compiler.model import Model, target_distribution

__all__ = [
    "MAX_FIT_VARIABLES", "LOSSES", "OPTIMIZERS", "Evaluator", "MMDLoss", "KLLoss", "FitResult", "RestartResult",
    "fit_model", "fit_key", "with_parameters", "without_parameters", "data_hash", "parse_samples", "mmd_unbiased", "parameters_dict", "check_fit_options",
]

MAX_FIT_VARIABLES = 20
LOSSES = ("kl", "mmd")
OPTIMIZERS = ("lbfgs", "adam")


# --------------------------------------------------------------------------- transforms
#: qubits whose 2x2 matrices are merged into one Kronecker product and applied as one matrix product
#: (one pass over the vector per group instead of one per qubit; 2**5 = 32 keeps the product cheap)
GROUP = 5


def _groups(n: int) -> list[tuple[int, int]]:
    """(first qubit, qubits) of each group of at most GROUP consecutive qubits."""
    return [(q0, min(GROUP, n - q0)) for q0 in range(0, n, GROUP)]


def _kron_group(mats: Sequence[np.ndarray], q0: int, k: int) -> np.ndarray:
    """The matrix on the group's sub-index sum_i b_{q0+i} 2^i: kron(m_{q0+k-1}, ..., m_{q0})."""
    out = mats[q0 + k - 1]
    for q in range(q0 + k - 2, q0 - 1, -1):
        b = mats[q]  # np.kron(out, b) without its generic-shape overhead (this runs per evaluation)
        out = (out[:, None, :, None] * b[None, :, None, :]).reshape(out.shape[0] * 2, out.shape[1] * 2)
    return out


@lru_cache(maxsize=64)
def _constant_groups(kind: str, n: int, r: float = 0.0) -> tuple[np.ndarray, ...]:
    """The group matrices of a fixed product (the Walsh-Hadamard transform, a kernel), built once per size."""
    m = _H2 if kind == "hadamard" else np.array([[1.0, r], [r, 1.0]])
    return tuple(_kron_group([m] * n, q0, k) for q0, k in _groups(n))


def _apply_group(vec: np.ndarray, mat: np.ndarray, q0: int, k: int) -> np.ndarray:
    """``mat`` (2^k x 2^k) on qubits q0..q0+k-1 of a little-endian vector (a new array)."""
    d, low = 1 << k, 1 << q0
    if low == 1:
        return (vec.reshape(-1, d) @ mat.T).reshape(-1)
    return np.matmul(mat, vec.reshape(-1, d, low)).reshape(-1)


def apply_product(vec: np.ndarray, mats: Sequence[np.ndarray]) -> np.ndarray:
    """(⊗_q mats[q]) vec, mats[q] acting on qubit q (bit q of the little-endian index)."""
    n = len(mats)
    for q0, k in _groups(n):
        vec = _apply_group(vec, _kron_group(mats, q0, k), q0, k)
    return vec


_H2 = np.array([[1.0, 1.0], [1.0, -1.0]])


def _apply_constant(vec: np.ndarray, groups: tuple[np.ndarray, ...], n: int) -> np.ndarray:
    for (q0, k), mat in zip(_groups(n), groups):
        vec = _apply_group(vec, mat, q0, k)
    return vec


def fwht(v: np.ndarray) -> np.ndarray:
    """Unnormalised Walsh-Hadamard transform of a real length-2**n vector (a new array):
    ``out[x] = sum_y v[y] (-1)^{popcount(x & y)}``."""
    v = np.asarray(v, dtype=float)
    n = v.size.bit_length() - 1
    return _apply_constant(v, _constant_groups("hadamard", n), n) if n else v.copy()


def _kernel_apply(v: np.ndarray, n: int, bandwidths: Sequence[float]) -> np.ndarray:
    """K v with K = mean over σ of ⊗_j [[1, r], [r, 1]], r = exp(-1/(2σ²))."""
    out = np.zeros(v.size)
    for s in bandwidths:
        r = math.exp(-1.0 / (2.0 * s * s))
        out += _apply_constant(np.asarray(v, dtype=float), _constant_groups("kernel", n, r), n)
    return out / len(bandwidths)


def _group_reduced(lc: np.ndarray, psi: np.ndarray, q0: int, k: int) -> np.ndarray:
    """R[i, j] = sum over the qubits outside the group of lc[.. i ..] psi[.. j ..] (lc = conj(lam)), i and j
    the group's sub-index: one matrix product over the vectors."""
    d, low = 1 << k, 1 << q0
    if low == 1:
        l2, p2 = lc.reshape(-1, d), psi.reshape(-1, d)
        return l2.T @ p2
    l3, p3 = lc.reshape(-1, d, low), psi.reshape(-1, d, low)
    if l3.shape[0] == 1:
        return l3[0] @ p3[0].T
    return np.matmul(l3, p3.transpose(0, 2, 1)).sum(axis=0)


def _reduced(lam: np.ndarray, psi: np.ndarray, n: int) -> np.ndarray:
    """M[q, a, b] = sum over the other qubits of conj(lam[.. a ..]) psi[.. b ..] on qubit q: per group of
    qubits one reduced 2^k x 2^k matrix (a matrix product), then a partial trace per qubit of the group."""
    out = np.empty((n, 2, 2), dtype=complex)
    lc = lam.conj()
    letters = "abcdefghij"
    for q0, k in _groups(n):
        r = _group_reduced(lc, psi, q0, k).reshape([2] * (2 * k))
        for t in range(k):
            # axis k-1-t of each index is bit t of the group; the other bits are traced (same letter twice)
            rows = [letters[s] for s in range(k)]
            cols = list(rows)
            rows[k - 1 - t], cols[k - 1 - t] = "y", "z"
            out[q0 + t] = np.einsum("".join(rows) + "".join(cols) + "->yz", r)
    return out


def _unit_phase(phi: np.ndarray) -> np.ndarray:
    """exp(i phi) (cos and sin written into one complex array: faster than a complex exp)."""
    out = np.empty(phi.size, dtype=complex)
    np.cos(phi, out=out.real)
    np.sin(phi, out=out.imag)
    return out


def u_matrix(th: float, ph: float, la: float) -> np.ndarray:
    """qiskit's ``UGate(θ, φ, λ)`` matrix."""
    c, s = math.cos(th / 2), math.sin(th / 2)
    return np.array([[c, -np.exp(1j * la) * s], [np.exp(1j * ph) * s, np.exp(1j * (ph + la)) * c]])


def _u_derivatives(th: float, ph: float, la: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    c, s = math.cos(th / 2), math.sin(th / 2)
    el, ep, epl = np.exp(1j * la), np.exp(1j * ph), np.exp(1j * (ph + la))
    d_th = 0.5 * np.array([[-s, -el * c], [ep * c, -epl * s]])
    d_ph = np.array([[0, 0], [1j * ep * s, 1j * epl * c]])
    d_la = np.array([[0, -1j * el * s], [0, 1j * epl * c]])
    return d_th, d_ph, d_la


# --------------------------------------------------------------------------- evaluator
class Evaluator:
    """The exact state and distribution of an ansatz family as a function of a flat parameter vector.

    Parameter order: term angles ``theta[layer, term]`` (terms in ``ansatz.terms`` order), then
    rotations ``rot[layer, qubit, (θ, φ, λ)]``; :meth:`pack` / :meth:`unpack` convert.
    """

    def __init__(self, ansatz: Ansatz):
        n = ansatz.num_qubits
        if n > MAX_FIT_VARIABLES:
            raise CapacityError(
                f"fitting is exact for at most {MAX_FIT_VARIABLES} variables (2**n amplitudes); this model has {n}",
                field="variables")
        self.ansatz = ansatz
        self.n = n
        self.layers = ansatz.layers
        self.masks = np.array([sum(1 << q for q in t.variables) for t in ansatz.terms], dtype=np.int64)
        self.num_terms = len(self.masks)
        self.size = self.layers * (self.num_terms + 3 * n)

    # parameters ------------------------------------------------------------------------
    def pack(self, theta: np.ndarray, rot: np.ndarray) -> np.ndarray:
        return np.concatenate([np.asarray(theta, float).ravel(), np.asarray(rot, float).ravel()])

    def unpack(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        k = self.layers * self.num_terms
        return x[:k].reshape(self.layers, self.num_terms), x[k:].reshape(self.layers, self.n, 3)

    def initial(self) -> np.ndarray:
        """The ansatz's own angles (from the model's parameters or its seeded generator)."""
        theta = np.array([[t.angles[l] for t in self.ansatz.terms] for l in range(self.layers)]).reshape(
            self.layers, self.num_terms)
        rot = np.array(self.ansatz.rotations, dtype=float).reshape(self.layers, self.n, 3)
        return self.pack(theta, rot)

    def random(self, rng: np.random.Generator) -> np.ndarray:
        """A random start: term angles uniform in [-π/4, π/4), rotation θ in [0, π), φ and λ in [-π, π)."""
        theta = rng.uniform(-np.pi / 4, np.pi / 4, size=(self.layers, self.num_terms))
        rot = np.empty((self.layers, self.n, 3))
        rot[..., 0] = rng.uniform(0, np.pi, size=(self.layers, self.n))
        rot[..., 1:] = rng.uniform(-np.pi, np.pi, size=(self.layers, self.n, 2))
        return self.pack(theta, rot)

    # forward / backward -----------------------------------------------------------------
    def _phase(self, theta_l: np.ndarray) -> np.ndarray:
        c = np.zeros(1 << self.n)
        np.add.at(c, self.masks, -theta_l)
        return _unit_phase(fwht(c))

    def _forward(self, x: np.ndarray) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
        """Per layer: (phase vector D, state after D, state after the rotations)."""
        theta, rot = self.unpack(np.asarray(x, float))
        psi = np.full(1 << self.n, (1 << self.n) ** -0.5, dtype=complex)
        out = []
        for l in range(self.layers):
            d = self._phase(theta[l])
            mid = psi * d
            psi = apply_product(mid, [u_matrix(*rot[l, q]) for q in range(self.n)])
            out.append((d, mid, psi))
        return out

    def state(self, x: np.ndarray) -> np.ndarray:
        """The final state vector (little-endian, qiskit's convention)."""
        return self._forward(x)[-1][2]

    def probabilities(self, x: np.ndarray) -> np.ndarray:
        psi = self.state(x)
        return psi.real ** 2 + psi.imag ** 2

    def value_and_grad(self, x: np.ndarray, loss: "Loss") -> tuple[float, np.ndarray]:
        """The loss and its gradient in every parameter (adjoint method).

        For the rotation layer U = ⊗ u_q: dU/dα = (du_q u_q^†)_q U, so every rotation's derivative
        is 2 Re tr(G^T M_q) with G = du_q u_q^† and M_q the reduced matrix of (costate, state) after
        the layer on qubit q; the block's derivative in θ_S is the Walsh-Hadamard transform of
        2 Im(conj(costate) state) at mask_S. The forward states are kept (a few vectors per layer),
        so the reverse pass only carries the costate back."""
        x = np.asarray(x, float)
        theta, rot = self.unpack(x)
        layers = self._forward(x)
        psi = layers[-1][2]
        p = psi.real ** 2 + psi.imag ** 2
        value, g = loss.value_and_grad_p(p)
        lam = g * psi  # dL/dψ* for L(|ψ|²)
        g_theta = np.zeros_like(theta)
        g_rot = np.zeros_like(rot)
        for l in reversed(range(self.layers)):
            d, mid, out = layers[l]
            us = [u_matrix(*rot[l, q]) for q in range(self.n)]
            m = _reduced(lam, out, self.n)
            uds = [u.conj().T for u in us]
            for q in range(self.n):
                for k, du in enumerate(_u_derivatives(*rot[l, q])):
                    g_rot[l, q, k] = 2.0 * float(np.real(np.sum((du @ uds[q]) * m[q])))
            lam = apply_product(lam, uds)
            w = 2.0 * np.imag(lam.conj() * mid)
            g_theta[l] = fwht(w)[self.masks]
            lam = lam * d.conj()
        return value, self.pack(g_theta, g_rot)


# --------------------------------------------------------------------------- losses
class Loss:
    name = ""

    def value_and_grad_p(self, p: np.ndarray) -> tuple[float, np.ndarray]:  # pragma: no cover - interface
        raise NotImplementedError


class KLLoss(Loss):
    """KL(target ‖ p) in nats; p floored at 1e-300 so the value stays finite."""

    name = "kl"

    def __init__(self, target: np.ndarray):
        self.target = np.asarray(target, float)
        self.support = self.target > 0
        t = self.target[self.support]
        self.entropy_term = float(np.sum(t * np.log(t)))

    def value_and_grad_p(self, p):
        ps = np.maximum(p[self.support], 1e-300)
        t = self.target[self.support]
        value = self.entropy_term - float(np.sum(t * np.log(ps)))
        g = np.zeros_like(p)
        g[self.support] = -t / ps
        return value, g


class MMDLoss(Loss):
    """Unbiased MMD² between p (exact) and samples (Gretton et al. 2012, eq. 3, one side exact)."""

    name = "mmd"

    def __init__(self, samples: np.ndarray, n: int, bandwidths: Sequence[float] = MMD_BANDWIDTHS):
        idx = np.asarray(samples, dtype=np.int64)
        if idx.ndim != 1 or idx.size < 2:
            raise ModelError("MMD needs at least two samples", field="data")
        if idx.min() < 0 or idx.max() >= 1 << n:
            raise ModelError(f"samples must be bitstring indices from 0 to 2**{n} - 1", field="data")
        self.n = n
        self.m = idx.size
        self.bandwidths = tuple(float(b) for b in bandwidths)
        hist = np.bincount(idx, minlength=1 << n).astype(float) / self.m
        self.k_data = _kernel_apply(hist, n, self.bandwidths)  # (K q̂)(x) = mean_j k(x, y_j)
        # 1/(m(m-1)) sum_{i≠j} k(y_i, y_j) = (m q̂ᵀKq̂ - k(0)) / (m - 1), k(0) = 1
        self.data_term = (self.m * float(hist @ self.k_data) - 1.0) / (self.m - 1)

    def value_and_grad_p(self, p):
        kp = _kernel_apply(p, self.n, self.bandwidths)
        value = float(p @ kp) - 2.0 * float(p @ self.k_data) + self.data_term
        return value, 2.0 * kp - 2.0 * self.k_data


def mmd_unbiased(p: np.ndarray, samples: np.ndarray, n: int, bandwidths: Sequence[float] = MMD_BANDWIDTHS) -> float:
    """The unbiased MMD² estimate between the exact distribution ``p`` and ``samples`` (indices)."""
    return MMDLoss(samples, n, bandwidths).value_and_grad_p(np.asarray(p, float))[0]


# --------------------------------------------------------------------------- data
def parse_samples(text: str, variables: Sequence[str]) -> np.ndarray:
    """Read a CSV of 0/1 samples (header = variable names, any column order) into little-endian indices.

    Raises :class:`ModelError` naming the missing or unknown column, the first bad line, or a
    constant column.
    """
    lines = [ln for ln in text.splitlines()]
    while lines and not lines[-1].strip():
        lines.pop()
    if not lines or not lines[0].strip():
        raise ModelError("the data file is empty: the first line must name the variables", field="data")
    header = [h.strip() for h in lines[0].split(",")]
    pos = {v: i for i, v in enumerate(variables)}
    unknown = [h for h in header if h not in pos]
    if unknown:
        raise ModelError(f"data line 1: column {unknown[0]!r} is not a variable of the model", field="data line 1")
    missing = [v for v in variables if v not in header]
    if missing:
        raise ModelError(f"data line 1: no column for variable {missing[0]!r}", field="data line 1")
    if len(set(header)) != len(header):
        raise ModelError("data line 1: a column is repeated", field="data line 1")
    shift = np.array([1 << pos[h] for h in header], dtype=np.int64)
    rows = []
    for ln, raw in enumerate(lines[1:], start=2):
        cells = [c.strip() for c in raw.split(",")]
        if len(cells) != len(header):
            raise ModelError(f"data line {ln}: {len(cells)} values but {len(header)} columns", field=f"data line {ln}")
        bad = [c for c in cells if c not in ("0", "1")]
        if bad:
            raise ModelError(f"data line {ln}: value {bad[0]!r} is not 0 or 1", field=f"data line {ln}")
        rows.append([c == "1" for c in cells])
    if len(rows) < 2:
        raise ModelError("the data file needs at least two sample lines", field="data")
    bits = np.array(rows, dtype=bool)
    for j, h in enumerate(header):
        if bits[:, j].all() or not bits[:, j].any():
            raise ModelError(f"data column {h!r} is constant ({int(bits[0, j])} on every line); a constant "
                             "variable cannot be fitted by this family", field=f"data column {h}")
    return (bits.astype(np.int64) * shift).sum(axis=1)


def data_hash(samples: np.ndarray | None) -> str | None:
    if samples is None:
        return None
    return hashlib.sha256(np.asarray(samples, dtype=np.int64).tobytes()).hexdigest()[:16]


# --------------------------------------------------------------------------- results
@dataclass
class RestartResult:
    restart: int
    loss: float
    iterations: int
    evaluations: int
    seconds: float
    message: str
    curve: list[float] = field(default_factory=list)

    def to_dict(self) -> dict:
        return {"restart": self.restart, "loss": self.loss if math.isfinite(self.loss) else None,
                "iterations": self.iterations,
                "evaluations": self.evaluations, "seconds": round(self.seconds, 4), "message": self.message,
                "curve": self.curve}


@dataclass
class FitResult:
    """The best parameters found and how each restart went."""

    loss_name: str
    family: str
    layers: int
    loss: float
    x: np.ndarray
    parameters: dict
    restarts: list[RestartResult]
    best_restart: int
    seconds: float
    interrupted: bool = False
    kl_target: float | None = None
    mmd_target: float | None = None
    mmd_data: float | None = None
    key: str | None = None

    def report(self) -> dict:
        return {"loss": self.loss_name, "family": self.family, "layers": self.layers,
                "final_loss": self.loss if math.isfinite(self.loss) else None,
                "best_restart": self.best_restart, "seconds": round(self.seconds, 3), "interrupted": self.interrupted,
                "kl_target": self.kl_target, "mmd_target": self.mmd_target, "mmd_data": self.mmd_data,
                "key": self.key, "restarts": [r.to_dict() for r in self.restarts]}


def parameters_dict(ev: Evaluator, x: np.ndarray) -> dict:
    """Flat parameters → the model format's ``parameters`` (one angle / triple per layer)."""
    theta, rot = ev.unpack(np.asarray(x, float))
    names = ev.ansatz.model.variables
    terms = {",".join(names[q] for q in t.variables): [float(theta[l, i]) for l in range(ev.layers)]
             for i, t in enumerate(ev.ansatz.terms)}
    rotations = {names[q]: [[float(v) for v in rot[l, q]] for l in range(ev.layers)] for q in range(ev.n)}
    return {"terms": terms, "rotations": rotations}


def fit_key(model: Model, *, family: str, layers: int, loss: str, samples: np.ndarray | None, seed: int,
            restarts: int, max_iter: int, optimizer: str, tol: float,
            bandwidths: Sequence[float] = MMD_BANDWIDTHS) -> str:
    """What decides a fit: the model (without its parameters), family, layers, loss, data, seed, options."""
    d = model.to_dict()
    d.pop("parameters", None)
    canon = json.dumps({"model": d, "family": family, "layers": layers, "loss": loss, "data": data_hash(samples),
                        "seed": seed, "restarts": restarts, "max_iter": max_iter, "optimizer": optimizer,
                        "tol": tol, "bandwidths": list(bandwidths) if loss == "mmd" else None},
                       sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(canon.encode()).hexdigest()


def check_fit_options(model: Model, *, family: str = "clique", layers: int = 1, loss: str = "kl",
                      samples: np.ndarray | None = None, restarts: int = 3, max_iter: int = 500,
                      optimizer: str = "lbfgs", tol: float = 1e-10, bandwidths: Sequence[float] = MMD_BANDWIDTHS,
                      learning_rate: float = 0.05) -> None:
    """Refuse bad fit options before any work (the field named)."""
    if loss not in LOSSES:
        raise ModelError(f"unknown loss {loss!r}; choose one of {', '.join(LOSSES)}", field="loss")
    if family not in FAMILIES:
        raise ModelError(f"unknown family {family!r}; choose one of {', '.join(FAMILIES)}", field="family")
    if optimizer not in OPTIMIZERS:
        raise ModelError(f"unknown optimizer {optimizer!r}; choose one of {', '.join(OPTIMIZERS)}", field="optimizer")
    for name, v, lo in (("layers", layers, 1), ("restarts", restarts, 1), ("max_iter", max_iter, 1)):
        if not isinstance(v, int) or isinstance(v, bool) or v < lo:
            raise ModelError(f"{name} must be an integer >= {lo}, got {v!r}", field=name)
    for name, v in (("tol", tol), ("learning_rate", learning_rate)):
        if not isinstance(v, (int, float)) or isinstance(v, bool) or not math.isfinite(v) or v < 0:
            raise ModelError(f"{name} must be a finite number >= 0, got {v!r}", field=name)
    if not bandwidths or any(not isinstance(b, (int, float)) or not math.isfinite(b) or b <= 0 for b in bandwidths):
        raise ModelError(f"kernel bandwidths must be positive numbers, got {list(bandwidths)!r}",
                         field="kernel_bandwidths")
    if model.num_variables > MAX_FIT_VARIABLES:
        raise CapacityError(
            f"fitting is exact for at most {MAX_FIT_VARIABLES} variables (the evaluator holds 2**n amplitudes); "
            f"this model has {model.num_variables}", field="variables")
    if loss == "kl" and not model.factors:
        raise ModelError("loss kl needs the model's factor tables (the target); the model has no factors: "
                         "give samples and use loss mmd", field="factors")
    if loss == "mmd" and samples is None and not model.factors:
        raise ModelError("loss mmd needs samples (data) or the model's factor tables to draw them from",
                         field="data")


Progress = Callable[[dict], Any]


def fit_model(model: Model, *, family: str = "clique", layers: int = 1, loss: str = "kl",
              samples: np.ndarray | None = None, bandwidths: Sequence[float] = MMD_BANDWIDTHS, restarts: int = 3,
              max_iter: int = 500, tol: float = 1e-10, optimizer: str = "lbfgs", learning_rate: float = 0.05,
              seed: int = 0, progress: Progress | None = None) -> FitResult:
    """Fit the angles of ``model``'s ``family`` circuit to its target (``kl``) or to ``samples`` (``mmd``).

    samples: little-endian indices of the observed bitstrings (:func:`parse_samples`); for ``mmd``
        without samples, none are drawn: give them.
    restarts: seeded random starts (``numpy.random.default_rng([seed, k])``); the best is kept.
    max_iter: iterations per restart. tol: stop a restart when the loss improves by less than
        ``tol * max(1, |loss|)`` in an iteration (scipy's ``ftol`` rule, also for Adam).
    progress: called with ``{"restart", "iteration", "loss", "best"}`` after every iteration; a true
        return value stops the fit (as an interrupt does): the best parameters so far are returned.
    A KeyboardInterrupt during the fit also ends it with the best so far (``interrupted``).
    """
    check_fit_options(model, family=family, layers=layers, loss=loss, samples=samples, restarts=restarts,
                      max_iter=max_iter, optimizer=optimizer, tol=tol, bandwidths=bandwidths,
                      learning_rate=learning_rate)
    # L-BFGS-B's small dense steps are ~10x slower with several BLAS threads than with one (measured)
    with _one_blas_thread():
        return _fit(model, family=family, layers=layers, loss=loss, samples=samples, bandwidths=bandwidths,
                    restarts=restarts, max_iter=max_iter, tol=tol, optimizer=optimizer, learning_rate=learning_rate,
                    seed=seed, progress=progress)


def _one_blas_thread():
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl is a dependency; numpy alone still works
        import contextlib

        return contextlib.nullcontext()
    return threadpool_limits(limits=1, user_api="blas")


def _fit(model: Model, *, family, layers, loss, samples, bandwidths, restarts, max_iter, tol, optimizer,
         learning_rate, seed, progress) -> FitResult:
    if loss == "mmd" and samples is None:
        raise ModelError("loss mmd needs samples (data)", field="data")
    ansatz = build_ansatz(without_parameters(model), family=family, layers=layers, seed=seed)
    ev = Evaluator(ansatz)
    target = target_distribution(model) if model.factors else None
    lossf: Loss = KLLoss(target) if loss == "kl" else MMDLoss(samples, ev.n, bandwidths)
    started = time.perf_counter()
    best = {"loss": math.inf, "x": ev.initial(), "restart": 0}
    results: list[RestartResult] = []
    interrupted = False

    class _Stop(Exception):
        pass

    for k in range(restarts):
        rng = np.random.default_rng([seed, k])
        x0 = ev.random(rng)
        t0 = time.perf_counter()
        state = {"evals": 0, "iters": 0, "curve": [], "last": None}

        def fun(x):
            v, g = ev.value_and_grad(x, lossf)
            state["evals"] += 1
            if v < best["loss"]:
                best.update(loss=v, x=np.array(x), restart=k)
            return v, g

        def after_iteration(v):
            state["iters"] += 1
            state["curve"].append(float(v))
            if progress is not None and progress({"restart": k, "iteration": state["iters"], "loss": float(v),
                                                  "best": float(best["loss"])}):
                raise _Stop
        message = ""
        try:
            if optimizer == "lbfgs":
                from scipy.optimize import minimize

                res = minimize(fun, x0, jac=True, method="L-BFGS-B",
                               options={"maxiter": max_iter, "ftol": tol, "gtol": 1e-12, "maxcor": 20},
                               callback=lambda intermediate_result: after_iteration(intermediate_result.fun))
                message = str(res.message)
            else:
                message = _adam(fun, x0, max_iter=max_iter, tol=tol, lr=learning_rate, after=after_iteration)
        except (_Stop, KeyboardInterrupt):
            interrupted = True
            message = "interrupted"
        final = min(state["curve"]) if state["curve"] else (best["loss"] if best["restart"] == k else math.inf)
        results.append(RestartResult(k, float(final), state["iters"], state["evals"], time.perf_counter() - t0,
                                     message, state["curve"]))
        if interrupted:
            break
    x = best["x"]
    p = ev.probabilities(x)
    out = FitResult(loss_name=loss, family=family, layers=layers, loss=float(best["loss"]), x=x,
                    parameters=parameters_dict(ev, x), restarts=results, best_restart=int(best["restart"]),
                    seconds=time.perf_counter() - started, interrupted=interrupted)
    if target is not None:
        from toposcout.compiler.metrics import mmd as mmd_distance

        kl = kl_divergence(target, p)
        out.kl_target = float(kl) if math.isfinite(kl) else None
        out.mmd_target = float(mmd_distance(target, p, bandwidths))
    if samples is not None:
        out.mmd_data = float(mmd_unbiased(p, samples, ev.n, bandwidths))
    out.key = fit_key(model, family=family, layers=layers, loss=loss, samples=samples, seed=seed, restarts=restarts,
                      max_iter=max_iter, optimizer=optimizer, tol=tol, bandwidths=bandwidths)
    return out


def _adam(fun, x0, *, max_iter: int, tol: float, lr: float, after, beta1: float = 0.9, beta2: float = 0.999,
          eps: float = 1e-8) -> str:
    """Adam (Kingma & Ba, ICLR 2015, Algorithm 1) on ``fun(x) -> (value, grad)``."""
    x = np.array(x0, float)
    m = np.zeros_like(x)
    v = np.zeros_like(x)
    prev = math.inf
    for t in range(1, max_iter + 1):
        val, g = fun(x)
        after(val)
        if abs(prev - val) <= tol * max(1.0, abs(val)):
            return "loss change below tol"
        prev = val
        m = beta1 * m + (1 - beta1) * g
        v = beta2 * v + (1 - beta2) * g * g
        mh = m / (1 - beta1 ** t)
        vh = v / (1 - beta2 ** t)
        x = x - lr * mh / (np.sqrt(vh) + eps)
    fun(x)  # the last step's loss counts for the best so far
    return "max_iter reached"


def without_parameters(model: Model) -> Model:
    """``model`` without fitted or given angles (what a fit starts from)."""
    if not model.parameters:
        return model
    d = model.to_dict()
    d.pop("parameters", None)
    return Model.from_dict(d)


def with_parameters(model: Model, parameters: Mapping[str, Any]) -> Model:
    """``model`` with its ``parameters`` replaced."""
    d = model.to_dict()
    d["parameters"] = json.loads(json.dumps(dict(parameters)))
    return Model.from_dict(d)
