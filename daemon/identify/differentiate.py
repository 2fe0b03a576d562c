"""Causal Savitzky-Golay smoothing differentiator and the matching delay line.

Implements the least-squares polynomial filters of A. Savitzky and M. J. E. Golay, "Smoothing
and differentiation of data by simplified least squares procedures", Analytical Chemistry 36(8),
1627-1639, 1964: a polynomial of degree ``order`` is fitted to the last ``window`` samples and
its value and first two derivatives are read at a point inside the window. Each is a fixed FIR
filter ``y[k] = sum_j b[j] x[k-j]``. The filter state is the last ``window - 1`` input samples,
carried explicitly between frames (``zi`` in, ``zf`` out, as with ``scipy.signal.lfilter``);
every output is computed by the same sequence of floating-point operations however the signal
is cut into frames, so frame-by-frame output equals all-at-once output bit for bit.

Lag. The fit is read at window position ``pos`` (0 = oldest sample, ``window - 1`` = newest),
so every output describes the signal ``lag = window - 1 - pos`` samples ago. The default reads
the centre (``pos = (window - 1) // 2``): the symmetric, phase-exact Savitzky-Golay filter,
delayed by half a window. Other signals that are combined with these outputs (the measured lift
and curvature) must be delayed by the same ``lag``; :class:`DelayLine` does that.

Noise. For white input noise of unit standard deviation the output noise has standard deviation
``sqrt(sum(b^2))`` (:func:`noise_gain`), in units per second^d for the d-th derivative.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = [
    "savgol_kernels",
    "lag_of",
    "noise_gain",
    "initial_state",
    "differentiate",
    "SavgolDifferentiator",
    "DelayLine",
]


def _check(window: int, order: int, pos: int | None, n_deriv: int) -> int:
    if int(window) != window or window < 2:
        raise ValueError(f"window must be an integer >= 2, got {window}")
    if int(order) != order or not 0 <= order < window:
        raise ValueError(f"order must be an integer in [0, window), got {order}")
    if n_deriv < 1 or n_deriv - 1 > order:
        raise ValueError(f"the polynomial order {order} cannot give derivative {n_deriv - 1}")
    if pos is None:
        pos = (window - 1) // 2
    if int(pos) != pos or not 0 <= pos < window:
        raise ValueError(f"pos must be an integer in [0, window), got {pos}")
    return int(pos)


def savgol_kernels(window: int, order: int, dt: float = 1.0, pos: int | None = None,
                   n_deriv: int = 3) -> np.ndarray:
    """FIR taps of the Savitzky-Golay value, first- and second-derivative filters.

    Parameters
    ----------
    window : int
        Number of samples in the fit.
    order : int
        Polynomial degree (``order >= n_deriv - 1``).
    dt : float
        Sample time in seconds; derivative taps are per second^d.
    pos : int, optional
        Window position at which the fit is evaluated; the centre by default.
    n_deriv : int
        Number of rows: value, first derivative, ... (3 gives value, d/dt, d2/dt2).

    Returns
    -------
    numpy.ndarray
        Shape ``(n_deriv, window)``; row ``d`` is the ``b`` of ``lfilter(b, 1, x)``, so
        ``b[j]`` multiplies ``x[k - j]``.

    Examples
    --------
    >>> (savgol_kernels(5, 2, n_deriv=2).round(6) + 0.0).tolist()  # + 0.0: no signed zeros
    [[-0.085714, 0.342857, 0.485714, 0.342857, -0.085714], [0.2, 0.1, 0.0, -0.1, -0.2]]
    """
    pos = _check(window, order, pos, n_deriv)
    if not dt > 0:
        raise ValueError(f"dt must be > 0, got {dt}")
    t = np.arange(window, dtype=float) - pos  # sample times relative to the evaluation point
    h = max(pos, window - 1 - pos, 1)
    vander = (t[:, None] / h) ** np.arange(order + 1)[None, :]  # V_ij = (t_i / h)^j
    fit = np.linalg.pinv(vander)  # least-squares polynomial coefficients, Savitzky & Golay eq. 1
    rows = []
    for d in range(n_deriv):
        dot = math.factorial(d) * fit[d] / (h * dt) ** d  # d-th derivative at t = 0
        rows.append(dot[::-1])  # lfilter order: b[j] multiplies x[k - j]
    return np.array(rows)


def lag_of(window: int, pos: int | None = None) -> int:
    """Delay in samples of a causal filter read at window position ``pos``.

    Examples
    --------
    >>> lag_of(21), lag_of(21, pos=20)
    (10, 0)
    """
    pos = (window - 1) // 2 if pos is None else int(pos)
    if not 0 <= pos < window:
        raise ValueError(f"pos must be in [0, {window}), got {pos}")
    return int(window - 1 - pos)


def noise_gain(kernels) -> np.ndarray:
    """White-noise gain ``sqrt(sum(b^2))`` of each kernel row.

    Examples
    --------
    >>> noise_gain([[0.25, 0.25, 0.25, 0.25]]).tolist()
    [0.5]
    """
    b = np.atleast_2d(np.asarray(kernels, dtype=float))
    return np.sqrt(np.sum(b * b, axis=1))  # std(out) / std(in) for white input


def initial_state(window: int, x0: float) -> np.ndarray:
    """Filter state for a past that was constant at ``x0``: ``window - 1`` copies of it.

    Derivative taps sum to zero, so a constant past gives zero derivative from the first
    sample on.
    """
    return np.full(int(window) - 1, float(x0))


def _fir(b: np.ndarray, x: np.ndarray, zi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``y[k] = sum_j b[:, j] x[k - j]`` for several kernels (frame-split exact).

    Each output is one dot product over the window, summed by numpy's own einsum loop
    (``optimize=False``: no BLAS), whose order depends only on the window, never on how many
    samples the frame holds; so frame by frame equals all at once, bit for bit.
    """
    w = b.shape[1]
    n = x.size
    ext = np.concatenate([zi, x])  # x[k - w + 1 .. k] for every k of the frame
    windows = np.lib.stride_tricks.sliding_window_view(ext, w)  # row k: x[k-w+1 .. k]
    out = np.einsum("ni,di->nd", windows, b[:, ::-1], optimize=False)  # sum_j b_j x[k - j]
    return out, ext[n:].copy()


def differentiate(x, window: int, order: int, dt: float, pos: int | None = None, zi=None,
                  n_deriv: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """Causal Savitzky-Golay value and derivatives of a sampled signal.

    Parameters
    ----------
    x : array_like
        Samples, shape ``(n,)``.
    window, order, dt, pos, n_deriv
        As in :func:`savgol_kernels`.
    zi : array_like, optional
        Filter state from a previous call (the last ``window - 1`` samples, oldest first); by
        default the past is taken as constant at ``x[0]`` (see :func:`initial_state`).

    Returns
    -------
    out : numpy.ndarray
        Shape ``(n, n_deriv)``: smoothed value, first and second derivative, each describing
        the signal ``lag_of(window, pos)`` samples before the current one.
    zf : numpy.ndarray
        Final state, to pass as ``zi`` with the next block.

    Examples
    --------
    >>> t = np.arange(40) * 0.01
    >>> out, _ = differentiate(3.0 * t**2, window=9, order=2, dt=0.01)
    >>> lag = lag_of(9)
    >>> print(round(out[-1, 1], 9), round(6.0 * t[-1 - lag], 9), round(out[-1, 2], 9))
    2.1 2.1 6.0
    """
    x = np.asarray(x, dtype=float)
    if x.ndim != 1:
        raise ValueError(f"x must be 1-D, got shape {x.shape}")
    b = savgol_kernels(window, order, dt, pos, n_deriv)
    if zi is None:
        zi = initial_state(window, x[0] if x.size else 0.0)
    zi = np.asarray(zi, dtype=float)
    if zi.shape != (window - 1,):
        raise ValueError(f"zi must have shape ({window - 1},), got {zi.shape}")
    return _fir(b, x, zi)


class SavgolDifferentiator:
    """Streaming causal Savitzky-Golay differentiator (value, rate, acceleration).

    Parameters
    ----------
    window, order : int
        Fit length and polynomial degree (``order >= 2``).
    rate : float
        Sample rate in Hz.
    pos : int, optional
        Evaluation position in the window (centre by default); ``lag = window - 1 - pos``.

    Examples
    --------
    >>> sg = SavgolDifferentiator(window=11, order=3, rate=100.0)
    >>> t = np.arange(30) / 100.0
    >>> a = sg.update(np.sin(t[:13]))
    >>> b = sg.update(np.sin(t[13:]))
    >>> whole, _ = differentiate(np.sin(t), 11, 3, 0.01)
    >>> bool(np.array_equal(np.vstack([a, b]), whole)), sg.lag
    (True, 5)
    """

    def __init__(self, window: int, order: int, rate: float, pos: int | None = None) -> None:
        if not (rate > 0 and math.isfinite(rate)):
            raise ValueError(f"rate must be positive and finite, got {rate}")
        self.window = int(window)
        self.order = int(order)
        self.rate = float(rate)
        self.pos = _check(window, order, pos, 3)
        self.kernels = savgol_kernels(self.window, self.order, 1.0 / self.rate, self.pos)
        self.reset()

    def reset(self) -> None:
        """Forget the filter state; the next frame's first sample seeds a constant past."""
        self._zi: np.ndarray | None = None

    @property
    def lag(self) -> int:
        """Delay of every output, in samples."""
        return lag_of(self.window, self.pos)

    @property
    def noise_gain(self) -> np.ndarray:
        """White-noise gain of value, rate and acceleration (per s^d per unit input)."""
        return noise_gain(self.kernels)

    def update(self, x) -> np.ndarray:
        """Filter one frame; returns shape ``(n, 3)``: value, first and second derivative."""
        x = np.asarray(x, dtype=float)
        if x.ndim != 1:
            raise ValueError(f"frame must be 1-D, got shape {x.shape}")
        if x.size == 0:
            return np.empty((0, 3))
        zi = self._zi if self._zi is not None else initial_state(self.window, x[0])
        out, self._zi = _fir(self.kernels, x, zi)
        return out

    def state_dict(self) -> dict:
        """Filter state (a copy; None before the first frame)."""
        return {"zi": None if self._zi is None else self._zi.copy()}

    def load_state_dict(self, state: dict) -> None:
        """Restore the state saved by :meth:`state_dict`."""
        zi = state["zi"]
        if zi is not None:
            zi = np.array(zi, dtype=float)
            if zi.shape != (self.window - 1,):
                raise ValueError(f"zi must have shape ({self.window - 1},), got {zi.shape}")
        self._zi = zi


class DelayLine:
    """Delay one or more channels by a whole number of samples, carrying the state explicitly.

    The state holds exactly ``lag`` samples per channel (bounded memory); before the first
    frame it is filled with that frame's first sample (a constant past, matching
    :func:`initial_state`).

    Parameters
    ----------
    lag : int
        Delay in samples (0 passes frames through).
    n_channels : int
        Number of channels (columns of a 2-D frame); 1-D frames are one channel.

    Examples
    --------
    >>> dl = DelayLine(2)
    >>> dl.update([1.0, 2.0, 3.0]).tolist(), dl.update([4.0]).tolist()
    ([1.0, 1.0, 1.0], [2.0])
    """

    def __init__(self, lag: int, n_channels: int = 1) -> None:
        if int(lag) != lag or lag < 0:
            raise ValueError(f"lag must be a non-negative integer, got {lag}")
        if int(n_channels) != n_channels or n_channels < 1:
            raise ValueError(f"n_channels must be a positive integer, got {n_channels}")
        self.lag = int(lag)
        self.n_channels = int(n_channels)
        self.reset()

    def reset(self) -> None:
        """Empty the ring; the next frame's first sample fills it."""
        self._ring: np.ndarray | None = None  # (lag, n_channels), oldest first

    def update(self, frame) -> np.ndarray:
        """Return the frame delayed by ``lag`` samples (same shape as the input)."""
        x = np.asarray(frame, dtype=float)
        flat = x.ndim == 1
        x2 = x[:, None] if flat else x
        if x2.ndim != 2 or x2.shape[1] != self.n_channels:
            raise ValueError(
                f"frame must have {self.n_channels} channel(s), got shape {x.shape}"
            )
        n = x2.shape[0]
        if self.lag == 0 or n == 0:
            return x.copy()
        if self._ring is None:
            self._ring = np.repeat(x2[:1], self.lag, axis=0)
        ext = np.concatenate([self._ring, x2], axis=0)  # lag + n samples: out[k] = x[k - lag]
        self._ring = ext[n:].copy()  # the newest lag samples, oldest first
        out = ext[:n]
        return out[:, 0].copy() if flat else out

    def state_dict(self) -> dict:
        """Ring contents, oldest first (a copy; None before the first frame)."""
        return {"ring": None if self._ring is None else self._ring.copy()}

    def load_state_dict(self, state: dict) -> None:
        """Restore the state saved by :meth:`state_dict`."""
        ring = state["ring"]
        if ring is not None:
            ring = np.array(ring, dtype=float).reshape(self.lag, self.n_channels)
        self._ring = ring
