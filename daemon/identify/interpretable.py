"""Interpretable lift-and-deformation model: coefficient columns plus a low-rank transient.

The model is the empirical state-space form of the unsteady lift (J. Fluids and Structures 38,
2013) extended to lift and deformation of a flexible wing (AIAA Journal, 2023): with
``y = [C_L, curvature]`` and the pitch rate driving the transient states,

    y(k)   = K_qs alpha(k) + K_rate alpha_dot(k) + K_am alpha_ddot(k) + C x(k) + bias
    x(k+1) = A x(k) + B alpha_dot(k)

``K_qs`` (quasi-steady), ``K_rate`` (pitch rate) and ``K_am`` (added mass) are 2-vectors, one
entry per output. Given ``(A, B)`` (from ERA) the model is linear in
``Theta = [K_qs; K_rate; K_am; C^T; bias]`` with the regressor

    phi(k) = [alpha, alpha_dot, alpha_ddot, x_1 .. x_r, 1]

which is what :func:`regressor` builds and what the recursive estimator
(:class:`wingwatch.daemon.identify.rls.RecursiveLeastSquares`) updates online. Only the signal
and its two derivatives enter directly: long lags of ``alpha`` alongside its derivatives would
be nearly collinear with them, and the lagged dynamics are what the states ``x`` carry.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from wingwatch.daemon.errors import IdentificationError

__all__ = [
    "InterpretableModel",
    "simulate_states",
    "block_end_state",
    "regressor",
    "regressor_names",
    "fit_interpretable",
]

_N_DIRECT = 3  # alpha, alpha_dot, alpha_ddot


def _state_matrices(A, B) -> tuple[np.ndarray, np.ndarray]:
    A = np.atleast_2d(np.asarray(A, dtype=float))
    if A.ndim != 2 or A.shape[0] != A.shape[1]:
        raise ValueError(f"A must be square, got shape {A.shape}")
    B = np.asarray(B, dtype=float).reshape(A.shape[0])
    return A, B


def simulate_states(A, B, u, x0=None, chunk: int = 64, *, cache: bool = True
                    ) -> tuple[np.ndarray, np.ndarray]:
    """States of ``x(k+1) = A x(k) + B u(k)`` over one frame, with explicit state in and out.

    Parameters
    ----------
    A : array_like
        Shape ``(r, r)``.
    B : array_like
        Shape ``(r,)`` or ``(r, 1)`` (single input: the pitch rate).
    u : array_like
        Input samples, shape ``(n,)``.
    x0 : array_like, optional
        State at the first sample (zeros by default).
    chunk : int
        Samples per vectorised step (memory ``chunk^2 r``).
    cache : bool
        Keep the lifted maps of ``(A, B)`` for the next call (the default: the pipeline runs the
        same few models block after block). False for a one-off model, so that it does not
        push the pipeline's models out of the bounded cache.

    Returns
    -------
    X : numpy.ndarray
        ``x(k)`` for each sample of the frame (before ``u(k)`` acts), shape ``(n, r)``.
    x_next : numpy.ndarray
        State after the frame, to pass as ``x0`` with the next frame.

    Examples
    --------
    >>> X, x1 = simulate_states([[0.5]], [1.0], [1.0, 0.0, 0.0])
    >>> X.ravel().tolist(), x1.tolist()
    ([0.0, 1.0, 0.5], [0.25])
    """
    A, B = _state_matrices(A, B)
    r = A.shape[0]
    u = np.asarray(u, dtype=float).ravel()
    x = np.zeros(r) if x0 is None else np.array(x0, dtype=float).reshape(r)
    n = u.size
    if n == 0 or r == 0:
        return np.zeros((n, r)), x
    L = int(min(max(chunk, 1), n))
    powers, H, T = _lifted(A, B, L, cache=cache)
    nb = -(-n // L)
    U = np.zeros(nb * L)
    U[:n] = u
    U = U.reshape(nb, L)
    # Block scan: the state at each block start, x_(b+1) = A^L x_b + H u_b (one r x r product
    # per block), then every sample of every block at once: x(bL + k) = A^k x_b + T_k u_b.
    HU = U @ H.T  # (nb, r)
    AL = powers[L]
    starts = np.empty((nb + 1, r))
    starts[0] = x
    for b in range(nb):
        starts[b + 1] = AL @ starts[b] + HU[b]
    X = starts[:nb] @ powers[:L].reshape(L * r, r).T  # (nb, L r): A^k x_b for every k
    X = (X + U @ T.T).reshape(nb * L, r)[:n]
    m = n - (nb - 1) * L  # samples in the last block
    if m == L:
        x_end = starts[nb]
    else:
        x_end = powers[m] @ starts[nb - 1] + H[:, L - m:] @ U[nb - 1, :m]
    return X, x_end


def block_end_state(A, B, U, x0) -> np.ndarray:
    """State after a block of ``x(k+1) = A x(k) + B u(k)`` with several inputs.

    ``B`` is ``(r, m)``, ``U`` is ``(n, m)``; returns ``A^n x0 + sum_j A^(n-1-j) B u(j)`` from
    the cached lifted maps of each input column (no loop over samples).

    Examples
    --------
    >>> block_end_state([[0.5]], [[1.0, 2.0]], [[1.0, 0.0], [0.0, 1.0]], [4.0]).tolist()
    [3.5]
    """
    A = np.atleast_2d(np.asarray(A, dtype=float))
    B = np.asarray(B, dtype=float).reshape(A.shape[0], -1)
    U = np.asarray(U, dtype=float).reshape(-1, B.shape[1])
    n = U.shape[0]
    x = np.asarray(x0, dtype=float).reshape(A.shape[0])
    if n == 0:
        return x.copy()
    L = min(n, 64)  # chunks of at most 64 samples: the lifted maps stay small and cached
    maps = [_lifted(A, np.ascontiguousarray(B[:, c]), L) for c in range(B.shape[1])]
    powers = maps[0][0]
    for start in range(0, n, L):
        m = min(L, n - start)
        x = powers[m] @ x
        for c, (_, H, _) in enumerate(maps):
            x = x + H[:, L - m:] @ U[start:start + m, c]
    return x


_LIFT_CACHE: dict[tuple, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}


def _lifted(A: np.ndarray, B: np.ndarray, L: int, *, cache: bool = True
            ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``powers[k] = A^k`` (k = 0..L), ``H[:, j] = A^(L-1-j) B`` and the block Toeplitz map
    ``T`` ((L r) x L: row ``k r + i`` gives state i at sample k from the block's inputs), cached
    by the bytes of (A, B) and L: the identifier and the watcher run the same few models on
    blocks of one length, so the matrices are built once per model, not once per block."""
    key = (A.tobytes(), B.tobytes(), A.shape[0], L)
    hit = _LIFT_CACHE.get(key) if cache else None
    if hit is not None:
        return hit
    r = A.shape[0]
    powers = np.empty((L + 1, r, r))
    powers[0] = np.eye(r)
    for k in range(1, L + 1):
        powers[k] = A @ powers[k - 1]
    h = powers[:L] @ B  # h[k] = A^k B, shape (L, r)
    lag = np.arange(L)[:, None] - np.arange(L)[None, :] - 1  # k - 1 - j
    toep = np.where((lag >= 0)[:, :, None], h[np.clip(lag, 0, None)], 0.0)  # (L, L, r)
    T = toep.transpose(0, 2, 1).reshape(L * r, L)
    H = h[::-1].T.copy()  # (r, L)
    for arr in (powers, H, T):
        arr.flags.writeable = False
    if not cache:
        return powers, H, T
    if len(_LIFT_CACHE) >= 24:  # bounded (an entry is up to about 1 MB): drop the oldest
        _LIFT_CACHE.pop(next(iter(_LIFT_CACHE)))
    _LIFT_CACHE[key] = (powers, H, T)
    return powers, H, T


def regressor(alpha, alpha_dot, alpha_ddot, states) -> np.ndarray:
    """Regressor ``[alpha, alpha_dot, alpha_ddot, x_1 .. x_r, 1]``, shape ``(n, 4 + r)``.

    Examples
    --------
    >>> regressor([1.0], [2.0], [3.0], [[4.0, 5.0]]).tolist()
    [[1.0, 2.0, 3.0, 4.0, 5.0, 1.0]]
    """
    a = np.asarray(alpha, dtype=float).ravel()
    ad = np.asarray(alpha_dot, dtype=float).ravel()
    add = np.asarray(alpha_ddot, dtype=float).ravel()
    X = np.asarray(states, dtype=float)
    X = X.reshape(a.size, -1) if X.size else np.zeros((a.size, 0))
    if not (a.size == ad.size == add.size == X.shape[0]):
        raise ValueError("alpha, alpha_dot, alpha_ddot and states must have the same length")
    return np.column_stack([a, ad, add, X, np.ones(a.size)])


def regressor_names(rank: int) -> list[str]:
    """Names of the regressor columns, in :func:`regressor` order.

    Examples
    --------
    >>> regressor_names(2)
    ['alpha', 'alpha_dot', 'alpha_ddot', 'x1', 'x2', 'bias']
    """
    return ["alpha", "alpha_dot", "alpha_ddot"] + [f"x{i + 1}" for i in range(rank)] + ["bias"]


@dataclass(frozen=True, eq=False)
class InterpretableModel:
    """Coefficient columns and transient of the interpretable model.

    Attributes
    ----------
    k_qs, k_rate, k_am, bias : numpy.ndarray
        Shape ``(n_out,)``: quasi-steady, pitch-rate, added-mass and constant terms.
    C : numpy.ndarray
        Transient output matrix, shape ``(n_out, r)``.
    A, B : numpy.ndarray
        Transient dynamics, shapes ``(r, r)`` and ``(r,)`` (input: pitch rate).
    """

    k_qs: np.ndarray
    k_rate: np.ndarray
    k_am: np.ndarray
    C: np.ndarray
    bias: np.ndarray
    A: np.ndarray
    B: np.ndarray

    @property
    def rank(self) -> int:
        """Number of transient states."""
        return int(self.A.shape[0])

    @property
    def theta(self) -> np.ndarray:
        """Coefficients stacked in regressor order, shape ``(4 + r, n_out)``."""
        return np.vstack([self.k_qs, self.k_rate, self.k_am, self.C.T, self.bias])

    @classmethod
    def from_theta(cls, theta, A, B) -> "InterpretableModel":
        """Build a model from stacked coefficients (the inverse of :attr:`theta`)."""
        A, B = _state_matrices(A, B)
        r = A.shape[0]
        th = np.asarray(theta, dtype=float)
        if th.ndim != 2 or th.shape[0] != _N_DIRECT + r + 1:
            raise ValueError(f"theta must have {_N_DIRECT + r + 1} rows, got shape {th.shape}")
        return cls(
            k_qs=th[0].copy(),
            k_rate=th[1].copy(),
            k_am=th[2].copy(),
            C=th[_N_DIRECT : _N_DIRECT + r].T.copy(),
            bias=th[-1].copy(),
            A=A.copy(),
            B=B.copy(),
        )

    def simulate(self, alpha, alpha_dot, alpha_ddot, x0=None) -> tuple[np.ndarray, np.ndarray]:
        """Model output over one frame, with the transient state carried in and out.

        Returns
        -------
        y : numpy.ndarray
            Shape ``(n, n_out)``.
        x_next : numpy.ndarray
            Transient state after the frame.

        Examples
        --------
        >>> m = InterpretableModel(k_qs=np.array([6.0, 1.0]), k_rate=np.zeros(2),
        ...     k_am=np.zeros(2), C=np.array([[1.0], [0.0]]), bias=np.zeros(2),
        ...     A=np.array([[0.5]]), B=np.array([1.0]))
        >>> y, x = m.simulate([0.1, 0.1], [1.0, 0.0], [0.0, 0.0])
        >>> y.round(12).tolist(), x.tolist()
        ([[0.6, 0.1], [1.6, 0.1]], [0.5])
        """
        X, x_next = simulate_states(self.A, self.B, alpha_dot, x0)
        phi = regressor(alpha, alpha_dot, alpha_ddot, X)
        return phi @ self.theta, x_next  # y = K_qs a + K_rate a' + K_am a'' + C x + bias


def fit_interpretable(alpha, alpha_dot, alpha_ddot, y, A, B, x0=None,
                      max_condition: float = 1e10) -> tuple[InterpretableModel, np.ndarray]:
    """Least-squares coefficient columns for a given transient ``(A, B)``.

    Parameters
    ----------
    alpha, alpha_dot, alpha_ddot : array_like
        Input and its derivatives, shape ``(n,)`` (aligned: same lag).
    y : array_like
        Outputs, shape ``(n, n_out)``.
    A, B : array_like
        Transient dynamics driven by ``alpha_dot``.
    x0 : array_like, optional
        Transient state at the first sample.
    max_condition : float
        Largest acceptable condition number of the (column-scaled) regressor.

    Returns
    -------
    model : InterpretableModel
    residual : numpy.ndarray
        ``y - model output``, shape ``(n, n_out)``.

    Raises
    ------
    IdentificationError
        If the manoeuvre does not separate the columns (regressor too ill-conditioned).
    """
    X, _ = simulate_states(A, B, alpha_dot, x0)
    phi = regressor(alpha, alpha_dot, alpha_ddot, X)
    y = np.asarray(y, dtype=float)
    y = y[:, None] if y.ndim == 1 else y
    if y.shape[0] != phi.shape[0]:
        raise ValueError("y must have one row per sample")
    if phi.shape[0] < phi.shape[1]:
        raise IdentificationError(
            f"fit_interpretable needs at least {phi.shape[1]} samples, got {phi.shape[0]}"
        )
    scale = np.sqrt(np.mean(phi * phi, axis=0))
    scale[scale == 0.0] = 1.0
    theta, _, rank, sv = np.linalg.lstsq(phi / scale, y, rcond=None)  # min |Phi Theta - y|
    if rank < phi.shape[1] or sv[0] > max_condition * sv[-1]:
        raise IdentificationError(
            "the data do not separate the model columns (regressor condition number "
            f"{sv[0] / max(sv[-1], 1e-300):.3g}); use a richer manoeuvre or a lower rank"
        )
    theta = theta / scale[:, None]
    model = InterpretableModel.from_theta(theta, A, B)
    return model, y - phi @ theta
