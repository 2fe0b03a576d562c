"""Eigensystem Realization Algorithm (ERA): a balanced state-space model from Markov parameters.

Implements the method of J.-N. Juang and R. S. Pappa, "An eigensystem realization algorithm for
modal parameter identification and model reduction", J. Guidance, Control and Dynamics 8(5),
620-627, 1985. The Markov parameters (the discrete impulse response) of

    x(k+1) = A x(k) + B u(k),    y(k) = C x(k) + D u(k)

are ``Y_0 = D`` and ``Y_k = C A^(k-1) B`` for k >= 1. They fill a block Hankel matrix whose
singular values say how many states the data support; a truncated SVD of that matrix gives a
balanced realisation (observability and controllability Gramians of the finite Hankel matrix
equal, both ``diag(hankel_sv[:rank])``).

Markov parameters are passed as one array of shape ``(n_markov, n_out, n_in)`` with
``markov[0] = D``. The rank rule :func:`choose_rank` reads the singular value spectrum; its
tail sum is the quantity that bounds the error of balanced truncation (K. Glover, "All optimal
Hankel-norm approximations of linear multivariable systems and their L-infinity error bounds",
Int. J. Control 39(6), 1984), which is why the energy measure below sums singular values rather
than their squares.

Equation numbers in the comments are cited from memory of the paper; check them against it
before quoting them elsewhere.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from wingwatch.daemon.errors import IdentificationError

__all__ = [
    "Realisation",
    "block_hankel",
    "era",
    "HankelFactors",
    "hankel_factors",
    "hankel_factors_near",
    "markov_of",
    "choose_rank",
    "unexplained_fraction",
]


@dataclass(frozen=True, eq=False)
class Realisation:
    """A discrete-time state-space realisation returned by :func:`era`.

    Attributes
    ----------
    A, B, C, D : numpy.ndarray
        State matrices, shapes ``(rank, rank)``, ``(rank, n_in)``, ``(n_out, rank)`` and
        ``(n_out, n_in)``.
    hankel_sv : numpy.ndarray
        All singular values of the block Hankel matrix ``H(0)``, descending.
    rank : int
        Number of states kept.
    """

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: np.ndarray
    hankel_sv: np.ndarray
    rank: int

    def markov(self, n: int) -> np.ndarray:
        """The first ``n`` Markov parameters of this realisation (see :func:`markov_of`)."""
        return markov_of(self.A, self.B, self.C, self.D, n)


def _as_markov(markov) -> np.ndarray:
    arr = np.asarray(markov, dtype=float)
    if arr.ndim == 1:
        arr = arr[:, None, None]
    if arr.ndim != 3:
        raise ValueError(f"markov must have shape (n_markov, n_out, n_in), got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError("markov contains non-finite values")
    return arr


def markov_of(A, B, C, D, n: int) -> np.ndarray:
    """Markov parameters ``[D, C B, C A B, ..., C A^(n-2) B]`` of a discrete system.

    Parameters
    ----------
    A, B, C, D : array_like
        State matrices, shapes ``(r, r)``, ``(r, n_in)``, ``(n_out, r)``, ``(n_out, n_in)``.
    n : int
        Number of Markov parameters, including ``D``.

    Returns
    -------
    numpy.ndarray
        Shape ``(n, n_out, n_in)``.

    Examples
    --------
    >>> m = markov_of([[0.5]], [[1.0]], [[2.0]], [[0.1]], 4)
    >>> m[:, 0, 0].tolist()
    [0.1, 2.0, 1.0, 0.5]
    """
    A = np.atleast_2d(np.asarray(A, dtype=float))
    B = np.asarray(B, dtype=float).reshape(A.shape[0], -1)
    C = np.asarray(C, dtype=float).reshape(-1, A.shape[0])
    D = np.asarray(D, dtype=float).reshape(C.shape[0], B.shape[1])
    if n < 1:
        raise ValueError(f"n must be >= 1, got {n}")
    out = np.empty((n, C.shape[0], B.shape[1]))
    out[0] = D  # Y_0 = D
    ab = B
    for k in range(1, n):
        out[k] = C @ ab  # Y_k = C A^(k-1) B
        ab = A @ ab
    return out


def block_hankel(markov, rows: int, cols: int, shift: int = 0) -> np.ndarray:
    """Block Hankel matrix ``H(shift)`` of Markov parameters.

    Block ``(i, j)`` is ``markov[1 + shift + i + j]`` (Juang & Pappa 1985, eq. 8), so ``H(0)``
    starts at ``C B`` and ``H(1)`` at ``C A B``.

    Parameters
    ----------
    markov : array_like
        Shape ``(n_markov, n_out, n_in)``; ``markov[0] = D`` is never used.
    rows, cols : int
        Number of block rows and block columns.
    shift : int, optional
        Time shift of the first block.

    Returns
    -------
    numpy.ndarray
        Shape ``(rows * n_out, cols * n_in)``.

    Examples
    --------
    >>> block_hankel(np.arange(6.0), 2, 3)
    array([[1., 2., 3.],
           [2., 3., 4.]])
    """
    mk = _as_markov(markov)
    n_markov, n_out, n_in = mk.shape
    if rows < 1 or cols < 1:
        raise ValueError(f"rows and cols must be >= 1, got rows={rows}, cols={cols}")
    need = 1 + shift + rows + cols - 1
    if need > n_markov:
        raise ValueError(
            f"block_hankel needs {need} Markov parameters for rows={rows}, cols={cols}, "
            f"shift={shift}; got {n_markov}"
        )
    idx = 1 + shift + np.arange(rows)[:, None] + np.arange(cols)[None, :]  # (rows, cols)
    blocks = mk[idx]  # (rows, cols, n_out, n_in)
    return blocks.transpose(0, 2, 1, 3).reshape(rows * n_out, cols * n_in)


def _fix_signs(U: np.ndarray, Vt: np.ndarray, r: int) -> None:
    """Make singular vectors deterministic: the largest entry of each left vector is positive."""
    k = np.argmax(np.abs(U[:, :r]), axis=0)
    s = np.sign(U[k, np.arange(r)])
    s[s == 0] = 1.0
    U[:, :r] *= s
    Vt[:r] *= s[:, None]


@dataclass(frozen=True, eq=False)
class HankelFactors:
    """The singular value decomposition of ``H(0)`` and the shifted ``H(1)``, computed once and
    shared by every :func:`era` call at any rank on the same Markov parameters and block shape
    (the online slow layer reads the singular values for the rank choice and then realises, at
    up to three ranks, from the same Hankel matrix). Read-only."""

    rows: int
    cols: int
    h1: np.ndarray
    U: np.ndarray
    s: np.ndarray
    Vt: np.ndarray


def _block_shape(n_markov: int, rows: int | None, cols: int | None) -> tuple[int, int]:
    usable = n_markov - 1
    if rows is None and cols is None:
        rows = usable // 2
        cols = usable - rows
    elif rows is None:
        rows = usable - cols
    elif cols is None:
        cols = usable - rows
    if rows < 1 or cols < 1 or rows + cols > usable:
        raise ValueError(
            f"rows={rows} and cols={cols} need rows + cols <= n_markov - 1 = {usable}"
        )
    return rows, cols


def hankel_factors(markov, rows: int | None = None, cols: int | None = None) -> HankelFactors:
    """``H(0) = U S V^T`` (Juang & Pappa 1985, eqs. 8-9) and ``H(1)``, for :func:`era`."""
    mk = _as_markov(markov)
    rows, cols = _block_shape(mk.shape[0], rows, cols)
    h0 = block_hankel(mk, rows, cols, shift=0)  # H(0), Juang & Pappa eq. 8
    h1 = block_hankel(mk, rows, cols, shift=1)  # H(1)
    U, s, Vt = np.linalg.svd(h0, full_matrices=False)  # H(0) = U S V^T, eq. 9
    for a in (h1, U, s, Vt):
        a.flags.writeable = False
    return HankelFactors(rows=rows, cols=cols, h1=h1, U=U, s=s, Vt=Vt)


def hankel_factors_near(markov, rank: int, near: HankelFactors, iterations: int = 2
                        ) -> HankelFactors:
    """The leading ``rank`` singular triplets of ``H(0)`` of ``markov``, found by subspace
    iteration from those of a nearby Hankel matrix ``near`` (same block shape).

    For Markov parameters that differ little from the ones ``near`` was computed on (draws from
    their posterior, :func:`wingwatch.daemon.identify.transient.markov_draws`), ``iterations``
    steps of orthogonal (subspace) iteration on ``H^T H`` started from ``near``'s right singular
    vectors, then the exact SVD of the small projected matrix (Rayleigh-Ritz), give the leading
    subspace far more cheaply than a full SVD (G. H. Golub and C. F. Van Loan, "Matrix
    Computations", 4th ed., 2013, sec. 8.2.4 and 10.4; N. Halko, P. G. Martinsson and J. A.
    Tropp, SIAM Review 53(2), 2011, algorithm 4.4). Only the first ``rank`` factors are
    returned, enough for :func:`era` at that rank; ``s`` then holds ``rank`` values.
    """
    mk = _as_markov(markov)
    rows, cols = near.rows, near.cols
    h0 = block_hankel(mk, rows, cols, shift=0)
    h1 = block_hankel(mk, rows, cols, shift=1)
    k = min(rank + 2, len(near.s))  # two guard vectors speed up convergence of the last one
    Q = near.Vt[:k].T
    for _ in range(max(iterations, 1)):
        Q, _r = np.linalg.qr(h0.T @ (h0 @ Q))
    Ub, s, Vt_small = np.linalg.svd(h0 @ Q, full_matrices=False)
    U = Ub[:, :rank]
    Vt = (Vt_small @ Q.T)[:rank]
    s = s[:rank]
    for a in (h1, U, s, Vt):
        a.flags.writeable = False
    return HankelFactors(rows=rows, cols=cols, h1=h1, U=U, s=s, Vt=Vt)


def era(markov, rank: int, rows: int | None = None, cols: int | None = None, *,
        factors: HankelFactors | None = None) -> Realisation:
    """Balanced realisation of Markov parameters by the Eigensystem Realization Algorithm.

    With ``H(0) = U S V^T`` truncated to ``rank`` singular values (Juang & Pappa 1985,
    eqs. 9-12 and 32-34)::

        A = S^-1/2 U^T H(1) V S^-1/2
        B = first n_in columns of S^1/2 V^T
        C = first n_out rows of U S^1/2
        D = markov[0]

    Parameters
    ----------
    markov : array_like
        Shape ``(n_markov, n_out, n_in)``, ``markov[0] = D`` and ``markov[k] = C A^(k-1) B``.
    rank : int
        Number of states, at most ``min(rows * n_out, cols * n_in)``.
    rows, cols : int, optional
        Block rows and columns of the Hankel matrix. By default the ``n_markov - 1`` usable
        parameters are split as evenly as possible (``rows + cols = n_markov - 1``).
    factors : HankelFactors, optional
        From :func:`hankel_factors` on the same ``markov``, ``rows`` and ``cols``: the SVD is
        then not recomputed (same result, bit for bit).

    Returns
    -------
    Realisation

    Raises
    ------
    IdentificationError
        If the Hankel matrix has fewer than ``rank`` non-zero singular values.

    Examples
    --------
    >>> mk = markov_of([[0.8, 0.2], [-0.2, 0.8]], [[1.0], [0.0]], [[1.0, 0.5]], [[0.0]], 12)
    >>> real = era(mk, 2)
    >>> real.hankel_sv[:2].round(6).tolist()
    [1.661453, 0.531412]
    >>> np.round(np.sort_complex(np.linalg.eigvals(real.A)), 6).tolist()
    [(0.8-0.2j), (0.8+0.2j)]
    """
    mk = _as_markov(markov)
    n_markov, n_out, n_in = mk.shape
    rows, cols = _block_shape(n_markov, rows, cols)
    if not 1 <= rank <= min(rows * n_out, cols * n_in):
        raise ValueError(
            f"rank must be between 1 and {min(rows * n_out, cols * n_in)}, got {rank}"
        )
    if factors is None or (factors.rows, factors.cols) != (rows, cols):
        factors = hankel_factors(mk, rows, cols)
    h1, U, s, Vt = factors.h1, factors.U, factors.s, factors.Vt
    if s[0] == 0.0 or s[rank - 1] <= s[0] * 1e3 * np.finfo(float).eps * max(U.shape[0], Vt.shape[1]):
        raise IdentificationError(
            f"the Hankel matrix supports fewer than rank={rank} states "
            f"(singular value {rank} is numerically zero)"
        )
    Ur, Vtr = U[:, :rank].copy(), Vt[:rank].copy()  # the shared factors stay untouched
    _fix_signs(Ur, Vtr, rank)
    Vr = Vtr.T
    root = np.sqrt(s[:rank])
    A = (Ur.T @ h1 @ Vr) / root[:, None] / root[None, :]  # A = S^-1/2 U^T H(1) V S^-1/2, eq. 33
    B = root[:, None] * Vtr[:, :n_in]  # B = S^1/2 V^T E_m, eq. 34
    C = Ur[:n_out] * root[None, :]  # C = E_p^T U S^1/2, eq. 34
    D = mk[0].copy()  # D = Y_0
    return Realisation(A=A, B=B, C=C, D=D, hankel_sv=s, rank=int(rank))


def unexplained_fraction(hankel_sv) -> np.ndarray:
    """Fraction of the singular value sum left out by each rank.

    ``u[r] = sum(s[r:]) / sum(s)`` for ``r = 0 .. len(s)``; ``u[0] = 1``, ``u[-1] = 0``.

    Examples
    --------
    >>> unexplained_fraction([3.0, 1.0]).tolist()
    [1.0, 0.25, 0.0]
    """
    s = np.asarray(hankel_sv, dtype=float)
    if s.ndim != 1 or s.size == 0 or np.any(s < 0) or not np.all(np.isfinite(s)):
        raise ValueError("hankel_sv must be a non-empty 1-D array of non-negative numbers")
    total = s.sum()
    if total == 0.0:
        return np.concatenate([[1.0], np.zeros(s.size)])
    tail = np.concatenate([np.cumsum(s[::-1])[::-1], [0.0]])
    return tail / total


def choose_rank(
    hankel_sv,
    energy: float | None = 0.999,
    gap: float | None = None,
    min_rank: int = 1,
    max_rank: int | None = None,
    rtol: float = 1e-10,
    previous: int | None = None,
    band: float = 4.0,
) -> int:
    """Choose the realisation rank from the Hankel singular value spectrum.

    The rule, in order:

    1. Singular values below ``rtol * s[0]`` are numerical zeros; the rank never exceeds the
       number of the others, nor ``max_rank``.
    2. Energy: the smallest rank ``r`` whose unexplained fraction ``u(r) = sum(s[r:]) / sum(s)``
       is at most ``1 - energy`` (see :func:`unexplained_fraction`). With ``energy=None`` the
       upper bound of rule 1 is used.
    3. Gap (optional): among ranks up to that one, the largest ``r`` where the spectrum drops
       by at least the factor ``gap`` (``s[r-1] / s[r] >= gap``) is taken instead; if there is
       no such drop the energy rank stands.
    4. Hysteresis (when ``previous`` is given, needs ``energy``): the previous rank is kept
       unless it is clearly too small, ``u(previous) > band * (1 - energy)``, or a smaller
       candidate clearly suffices, ``u(candidate) < (1 - energy) / band``. ``band = 1`` turns
       hysteresis off; larger bands hold the rank longer.

    Finally the result is clipped to ``[min_rank, upper bound]``.

    Parameters
    ----------
    hankel_sv : array_like
        Singular values, descending (as in :attr:`Realisation.hankel_sv`).
    energy : float or None
        Target explained fraction in (0, 1].
    gap : float or None
        Minimum ratio of consecutive singular values that counts as a gap (> 1).
    min_rank, max_rank : int
        Bounds on the result.
    rtol : float
        Relative level below which singular values count as zero.
    previous : int or None
        Rank chosen last time, for hysteresis.
    band : float
        Hysteresis factor on the unexplained fraction (>= 1).

    Returns
    -------
    int

    Examples
    --------
    >>> sv = [10.0, 5.0, 1.0, 0.01, 0.009, 0.008]
    >>> choose_rank(sv, energy=0.999)
    5
    >>> choose_rank(sv, energy=0.999, gap=50.0)
    3
    >>> choose_rank(sv, energy=0.999, previous=3, band=4.0)
    3
    """
    s = np.asarray(hankel_sv, dtype=float)
    u = unexplained_fraction(s)
    if energy is not None and not 0.0 < energy <= 1.0:
        raise ValueError(f"energy must be in (0, 1], got {energy}")
    if gap is not None and not gap > 1.0:
        raise ValueError(f"gap must be > 1, got {gap}")
    if band < 1.0:
        raise ValueError(f"band must be >= 1, got {band}")
    if min_rank < 1:
        raise ValueError(f"min_rank must be >= 1, got {min_rank}")
    numerical = int(np.count_nonzero(s > rtol * s[0])) if s[0] > 0 else 0
    upper = max(min(numerical, s.size if max_rank is None else max_rank), min_rank)
    if energy is None:
        rank = upper
    else:
        target = 1.0 - energy
        ok = np.nonzero(u[1:] <= target * (1.0 + 1e-12) + 1e-300)[0]
        rank = int(ok[0]) + 1 if ok.size else s.size
    rank = min(rank, upper)
    top = min(rank, s.size - 1)
    if gap is not None and top >= 1:
        ratios = s[:top] / np.maximum(s[1 : top + 1], np.finfo(float).tiny)  # s[r-1] / s[r]
        drops = np.nonzero(ratios >= gap)[0]
        if drops.size:
            rank = int(drops[-1]) + 1
    if previous is not None:
        if energy is None:
            raise ValueError("hysteresis (previous) needs an energy target")
        prev = int(previous)
        target = 1.0 - energy
        if 1 <= prev <= upper:
            too_small = u[prev] > band * target
            smaller_suffices = rank < prev and u[rank] < target / band
            if not (too_small or smaller_suffices):
                rank = prev
    return int(min(max(rank, min_rank), upper))
