"""Observer/Kalman filter identification (OKID): system Markov parameters from input-output data.

Implements J.-N. Juang, M. Phan, L. G. Horta and R. W. Longman, "Identification of
observer/Kalman filter Markov parameters: theory and experiments", J. Guidance, Control and
Dynamics 16(2), 320-329, 1993 (first as NASA TM-104069, 1991).

A system ``x(k+1) = A x + B u``, ``y = C x + D u`` is rewritten with an observer gain ``G`` as

    x(k+1) = (A + G C) x(k) + [B + G D, -G] v(k),    v(k) = [u(k); y(k)]

Because ``A + G C`` can be made to decay (to zero after a few steps for a deadbeat observer),
``y(k)`` is a finite regression on ``u(k)`` and the past ``order`` samples of ``v``:

    y(k) = D u(k) + sum_{j=1..order} Ybar_j v(k-j)                     (Juang et al. eq. 9)

``observer_markov`` fits ``D`` and ``Ybar_j`` by linear least squares; ``system_markov`` turns
them into the system Markov parameters ``Y_k = C A^(k-1) B`` by the OKID recursion. The
regression is exact on noise-free data once ``order * n_out`` is at least the system order.

Equation numbers in the comments are cited from memory of the paper; check them against it
before quoting them elsewhere.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from wingwatch.daemon.errors import IdentificationError

__all__ = ["ObserverMarkov", "observer_markov", "system_markov"]


@dataclass(frozen=True, eq=False)
class ObserverMarkov:
    """Observer Markov parameters fitted by :func:`observer_markov`.

    Attributes
    ----------
    D : numpy.ndarray
        Direct term, shape ``(n_out, n_in)``.
    ybar : numpy.ndarray
        Observer Markov parameters ``Ybar_1 .. Ybar_order``, shape
        ``(order, n_out, n_in + n_out)``; columns ``[:n_in]`` multiply ``u(k-j)`` and
        columns ``[n_in:]`` multiply ``y(k-j)``.
    residual_rms : numpy.ndarray
        Root-mean-square fit residual per output, shape ``(n_out,)``.
    singular_values : numpy.ndarray
        Singular values of the data matrix (a small last one means the order is larger than
        the data need, or the input is not rich enough).
    """

    D: np.ndarray
    ybar: np.ndarray
    residual_rms: np.ndarray
    singular_values: np.ndarray

    @property
    def order(self) -> int:
        """Number of past samples in the observer regression."""
        return int(self.ybar.shape[0])


def _as_columns(x, name: str) -> np.ndarray:
    arr = np.asarray(x, dtype=float)
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2:
        raise ValueError(f"{name} must have shape (n_samples, n_channels), got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} contains non-finite values")
    return arr


def observer_markov(u, y, order: int, rcond: float = 1e-10) -> ObserverMarkov:
    """Least-squares observer Markov parameters from one record of input and output.

    Parameters
    ----------
    u : array_like
        Input, shape ``(N,)`` or ``(N, n_in)``.
    y : array_like
        Output, shape ``(N,)`` or ``(N, n_out)``.
    order : int
        Number of past samples ``p`` (observer order); ``p * n_out`` must reach the order of
        the system for exact recovery.
    rcond : float
        Relative cut-off for small singular values of the data matrix (the minimum-norm
        solution is returned when the regression is over-parameterised).

    Returns
    -------
    ObserverMarkov

    Raises
    ------
    IdentificationError
        If the record is too short for the number of unknowns.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> u = rng.standard_normal(200)
    >>> y = np.zeros(200)
    >>> y[1:] = 0.5 * u[:-1]            # y(k) = 0.5 u(k-1): D = 0, C B = 0.5
    >>> fit = observer_markov(u, y, order=2)
    >>> print(round(float(fit.D[0, 0]), 12) + 0.0, round(float(fit.ybar[0, 0, 0]), 12))
    0.0 0.5
    """
    u = _as_columns(u, "u")
    y = _as_columns(y, "y")
    if u.shape[0] != y.shape[0]:
        raise ValueError(f"u and y must have the same length, got {u.shape[0]} and {y.shape[0]}")
    if order < 1:
        raise ValueError(f"order must be >= 1, got {order}")
    n, n_in = u.shape
    n_out = y.shape[1]
    n_v = n_in + n_out
    n_par = n_in + order * n_v
    rows = n - order
    if rows < n_par:
        raise IdentificationError(
            f"observer_markov needs at least {n_par + order} samples for order={order}, got {n}"
        )
    # Least-squares set-up (Juang et al. 1993, eq. 10), one row per time k = p .. N-1:
    #
    #        Yk            =        V                     @      Theta
    #   (rows x n_out)       (rows x (n_in + p n_v))        ((n_in + p n_v) x n_out)
    #
    #   [ y(p)^T   ]     [ u(p)^T   v(p-1)^T  ...  v(0)^T   ]     [ D^T      ]
    #   [ y(p+1)^T ]  =  [ u(p+1)^T v(p)^T    ...  v(1)^T   ]  @  [ Ybar_1^T ]
    #   [   ...    ]     [   ...                            ]     [   ...    ]
    #   [ y(N-1)^T ]     [ u(N-1)^T v(N-2)^T  ...  v(N-p-1)^T ]   [ Ybar_p^T ]
    v = np.concatenate([u, y], axis=1)  # v(k) = [u(k); y(k)], eq. 6
    lagged = np.lib.stride_tricks.sliding_window_view(v[: n - 1], order, axis=0)  # (n-p, n_v, p)
    past = lagged[:, :, ::-1].transpose(0, 2, 1).reshape(rows, order * n_v)  # v(k-1) .. v(k-p)
    V = np.concatenate([u[order:], past], axis=1)
    Yk = y[order:]
    scale = np.sqrt(np.mean(V * V, axis=0))  # column scaling for a well-posed rcond
    scale[scale == 0.0] = 1.0
    theta, _, _, sv = np.linalg.lstsq(V / scale, Yk, rcond=rcond)  # Theta = V^+ Yk, eq. 11
    theta = theta / scale[:, None]
    resid = Yk - V @ theta
    D = theta[:n_in].T
    ybar = theta[n_in:].reshape(order, n_v, n_out).transpose(0, 2, 1)
    return ObserverMarkov(
        D=D,
        ybar=ybar,
        residual_rms=np.sqrt(np.mean(resid * resid, axis=0)),
        singular_values=sv,
    )


def system_markov(observer_params: ObserverMarkov, n: int) -> np.ndarray:
    """System Markov parameters from observer Markov parameters by the OKID recursion.

    With ``Ybar_k = [Ybar_k^(1), Ybar_k^(2)]`` split into the ``u`` and ``y`` columns
    (``Ybar_k^(2) = -C (A + G C)^(k-1) G``) and ``Ybar_k = 0`` for ``k > order``::

        Y_0 = D
        Y_k = Ybar_k^(1) + sum_{i=1..k} Ybar_i^(2) Y_(k-i)        (Juang et al. 1993, eq. 17)

    Parameters
    ----------
    observer_params : ObserverMarkov
        From :func:`observer_markov`.
    n : int
        Number of system Markov parameters to return, including ``Y_0 = D``.

    Returns
    -------
    numpy.ndarray
        Shape ``(n, n_out, n_in)``, ready for :func:`wingwatch.daemon.identify.era.era`.

    Examples
    --------
    >>> obs = ObserverMarkov(D=np.zeros((1, 1)), ybar=np.array([[[1.0, 0.5]]]),
    ...                      residual_rms=np.zeros(1), singular_values=np.ones(3))
    >>> system_markov(obs, 5)[:, 0, 0].tolist()     # y(k) = 0.5 y(k-1) + u(k-1)
    [0.0, 1.0, 0.5, 0.25, 0.125]
    """
    D = observer_params.D
    ybar = observer_params.ybar
    n_out, n_in = D.shape
    order = ybar.shape[0]
    if n < 1:
        raise ValueError(f"n must be >= 1, got {n}")
    y1 = ybar[:, :, :n_in]  # Ybar^(1): input part
    y2 = ybar[:, :, n_in:]  # Ybar^(2): output part (already carries the minus sign)
    out = np.zeros((n, n_out, n_in))
    out[0] = D  # Y_0 = D
    for k in range(1, n):
        m = min(k, order)
        past = out[k - m : k][::-1]  # Y_(k-1), Y_(k-2), ..., Y_(k-m)
        acc = np.einsum("iab,ibc->ac", y2[:m], past)  # sum_i Ybar_i^(2) Y_(k-i), eq. 17
        if k <= order:
            acc += y1[k - 1]  # + Ybar_k^(1)
        out[k] = acc
    return out
