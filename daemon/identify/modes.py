"""Modal parameters of a discrete realisation, the Modal Assurance Criterion and mode tracking.

A discrete eigenvalue ``z`` at sample time ``dt`` maps to the continuous one ``s = log(z) / dt``
(the zero-order-hold correspondence ``z = exp(s dt)``); the natural frequency is ``|s| / 2 pi``
in Hz and the damping ratio ``-Re(s) / |s|``. Mode shapes are compared with the Modal Assurance
Criterion of R. J. Allemang and D. L. Brown, "A correlation coefficient for modal vector
analysis", Proc. 1st International Modal Analysis Conference, 1982:

    MAC(a, b) = |a^H b|^2 / ((a^H a) (b^H b))

:class:`ModeTracker` keeps the identity of modes across successive realisations (whose state
bases and eigenvalue order are arbitrary) by solving a linear assignment problem on a cost that
combines relative frequency distance and ``1 - MAC`` (H. W. Kuhn, "The Hungarian method for the
assignment problem", Naval Research Logistics Quarterly 2, 1955, as implemented by
``scipy.optimize.linear_sum_assignment``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Modes", "modal_parameters", "mac", "mac_matrix", "ModeTracker"]


@dataclass(frozen=True, eq=False)
class Modes:
    """Modes of a discrete realisation, one entry per eigenvalue with ``Im(z) >= 0``.

    Attributes
    ----------
    frequency_hz : numpy.ndarray
        Natural frequency ``|s| / 2 pi`` (Hz), ascending.
    damping : numpy.ndarray
        Damping ratio ``-Re(s) / |s|`` (1 for a real decaying pole, negative when unstable).
    z : numpy.ndarray
        Discrete eigenvalues.
    s : numpy.ndarray
        Continuous eigenvalues ``log(z) / dt``.
    shapes : numpy.ndarray
        Output mode shapes ``C v`` (complex), shape ``(n_out, n_modes)``.
    participation : numpy.ndarray or None
        Share of each mode in each output's impulse-response energy, shape
        ``(n_out, n_modes)``; rows sum to 1 (None when no ``B`` was given).
    oscillatory : numpy.ndarray
        True for complex pairs.
    """

    frequency_hz: np.ndarray
    damping: np.ndarray
    z: np.ndarray
    s: np.ndarray
    shapes: np.ndarray
    participation: np.ndarray | None
    oscillatory: np.ndarray

    def __len__(self) -> int:
        return int(self.z.size)


def modal_parameters(A, dt: float, C=None, B=None) -> Modes:
    """Frequencies, damping ratios, output shapes and participation of a discrete ``A``.

    Parameters
    ----------
    A : array_like
        Discrete state matrix, shape ``(r, r)``.
    dt : float
        Sample time in seconds.
    C : array_like, optional
        Output matrix ``(n_out, r)``; mode shapes are ``C v``. Identity when omitted.
    B : array_like, optional
        Input matrix ``(r, n_in)``; with it, participation is computed.

    Returns
    -------
    Modes

    Notes
    -----
    Participation of mode ``i`` in output ``o`` is the energy of its term in the impulse
    response, ``|c_oi|^2 |b_i|^2 / (1 - |z_i|^2)`` with ``c_oi = (C v_i)_o`` and ``b_i`` the
    ``i``-th row of ``V^-1 B`` (Euclidean norm over inputs); a complex pair is counted once,
    doubled. Cross terms between modes are ignored, so this is a ranking, not a decomposition.

    Examples
    --------
    >>> dt = 0.001
    >>> s = -0.02 * 2 * np.pi * 10 + 2j * np.pi * 10 * np.sqrt(1 - 0.02**2)
    >>> z = np.exp(s * dt)
    >>> A = np.array([[z.real, -z.imag], [z.imag, z.real]])
    >>> m = modal_parameters(A, dt)
    >>> print(np.round(m.frequency_hz, 9), np.round(m.damping, 9))
    [10.] [0.02]
    """
    A = np.atleast_2d(np.asarray(A, dtype=float))
    if A.ndim != 2 or A.shape[0] != A.shape[1]:
        raise ValueError(f"A must be square, got shape {A.shape}")
    if not dt > 0:
        raise ValueError(f"dt must be > 0, got {dt}")
    r = A.shape[0]
    C = np.eye(r) if C is None else np.asarray(C, dtype=float).reshape(-1, r)
    z_all, V = np.linalg.eig(A)
    tiny = 1e-12 * np.maximum(np.abs(z_all), 1.0)
    pair_imag = np.abs(z_all.imag) > tiny  # member of a complex-conjugate pair
    idx = np.nonzero(z_all.imag >= -tiny)[0]  # one of each pair (Im z > 0), real poles once
    z = z_all[idx]
    s = np.log(z.astype(complex)) / dt  # s = log(z) / dt
    wn = np.abs(s)
    freq = wn / (2.0 * np.pi)  # f = |s| / 2 pi
    with np.errstate(invalid="ignore", divide="ignore"):
        zeta = np.where(wn > 0, -s.real / wn, 1.0)  # zeta = -Re(s) / |s|
    shapes = C @ V[:, idx]
    participation = None
    if B is not None:
        B = np.asarray(B, dtype=float).reshape(r, -1)
        modal_b = np.linalg.solve(V, B.astype(complex))[idx]  # rows of V^-1 B
        gain = np.abs(shapes) ** 2 * (np.linalg.norm(modal_b, axis=1) ** 2)[None, :]
        with np.errstate(divide="ignore"):
            energy = gain / np.maximum(1.0 - np.abs(z) ** 2, 1e-300)[None, :]
        energy = np.where(pair_imag[idx][None, :], 2.0 * energy, energy)
        total = energy.sum(axis=1, keepdims=True)
        participation = np.divide(energy, total, out=np.zeros_like(energy), where=total > 0)
    order = np.lexsort((zeta, freq))
    return Modes(
        frequency_hz=freq[order],
        damping=zeta[order],
        z=z[order],
        s=s[order],
        shapes=shapes[:, order],
        participation=None if participation is None else participation[:, order],
        oscillatory=pair_imag[idx][order],
    )


def mac(a, b) -> float:
    """Modal Assurance Criterion of two (complex) vectors, in [0, 1].

    ``MAC = |a^H b|^2 / ((a^H a)(b^H b))`` (Allemang & Brown 1982); 0 when either is zero.

    Examples
    --------
    >>> mac([1.0, 2.0], [2.0, 4.0]), mac([1.0, 0.0], [0.0, 3.0])
    (1.0, 0.0)
    """
    a = np.asarray(a).ravel()
    b = np.asarray(b).ravel()
    if a.shape != b.shape:
        raise ValueError(f"vectors must have the same length, got {a.size} and {b.size}")
    den = np.vdot(a, a).real * np.vdot(b, b).real
    if den == 0.0:
        return 0.0
    return float(min(abs(np.vdot(a, b)) ** 2 / den, 1.0))  # |a^H b|^2 / (a^H a b^H b)


def mac_matrix(Phi_a, Phi_b) -> np.ndarray:
    """MAC between every column of ``Phi_a`` (n, ka) and of ``Phi_b`` (n, kb), shape (ka, kb).

    Examples
    --------
    >>> mac_matrix(np.eye(2), np.array([[1.0, 1.0], [0.0, 1.0]])).round(3).tolist()
    [[1.0, 0.5], [0.0, 0.5]]
    """
    a = np.atleast_2d(np.asarray(Phi_a))
    b = np.atleast_2d(np.asarray(Phi_b))
    if a.shape[0] != b.shape[0]:
        raise ValueError("mode shape sets must have the same number of rows")
    cross = np.abs(a.conj().T @ b) ** 2
    na = np.sum(np.abs(a) ** 2, axis=0)
    nb = np.sum(np.abs(b) ** 2, axis=0)
    den = na[:, None] * nb[None, :]
    out = np.divide(cross, den, out=np.zeros_like(cross, dtype=float), where=den > 0)
    return np.minimum(out, 1.0)


class ModeTracker:
    """Keep mode labels stable across successive identifications.

    Each tracked mode carries a label (1, 2, ... in order of first appearance, ties broken by
    frequency), its latest frequency, damping and shape. An update matches the new modes to
    the tracked ones by minimising, with ``scipy.optimize.linear_sum_assignment``, the cost

        cost_ij = |f_i - f_j| / (freq_tol * max(f_j, f_floor)) + (1 - MAC_ij) / (1 - mac_min)
                  + |zeta_i - zeta_j| / damp_tol

    Pairs whose relative frequency distance exceeds ``freq_tol`` or whose MAC is below
    ``mac_min`` are not matched; unmatched new modes get fresh labels, and tracked modes
    missing for more than ``max_missed`` updates are dropped. At most ``max_tracks`` are kept.

    Parameters
    ----------
    freq_tol : float
        Largest relative frequency change that can still be the same mode.
    mac_min : float
        Smallest MAC that can still be the same mode (0 disables the shape test).
    f_floor : float
        Frequency (Hz) below which distances are measured absolutely (real poles).
    max_missed : int
        Updates a mode may be absent before its label is retired.
    max_tracks : int
        Bound on the number of tracked modes.
    damp_tol : float
        Damping-ratio difference that costs as much as a relative frequency change of
        ``freq_tol`` (0 leaves damping out). A cost only, never a bar: damping is the poorly
        determined modal quantity. It tells apart a spurious mode that appears next to a tracked
        one at nearly its frequency (seen on the rig: a 6.54 Hz mode with damping ratio 0.08 took
        the label of the 6.4 Hz, 0.25 bending mode for one update) when the two-output shapes do
        not.

    Examples
    --------
    >>> tr = ModeTracker()
    >>> tr.update([2.0, 7.0], [0.02, 0.05]).tolist()
    [1, 2]
    >>> tr.update([7.1, 2.02], [0.05, 0.02]).tolist()
    [2, 1]
    """

    def __init__(
        self,
        freq_tol: float = 0.15,
        mac_min: float = 0.6,
        f_floor: float = 0.1,
        max_missed: int = 5,
        max_tracks: int = 32,
        damp_tol: float = 0.25,
    ) -> None:
        if not freq_tol > 0:
            raise ValueError(f"freq_tol must be > 0, got {freq_tol}")
        if not 0.0 <= mac_min < 1.0:
            raise ValueError(f"mac_min must be in [0, 1), got {mac_min}")
        if not f_floor > 0:
            raise ValueError(f"f_floor must be > 0, got {f_floor}")
        if max_missed < 0 or max_tracks < 1:
            raise ValueError("max_missed must be >= 0 and max_tracks >= 1")
        if not damp_tol >= 0:
            raise ValueError(f"damp_tol must be >= 0, got {damp_tol}")
        self.damp_tol = float(damp_tol)
        self.freq_tol = float(freq_tol)
        self.mac_min = float(mac_min)
        self.f_floor = float(f_floor)
        self.max_missed = int(max_missed)
        self.max_tracks = int(max_tracks)
        self.reset()

    def reset(self) -> None:
        """Drop every tracked mode; labels start again at 1."""
        self._labels: list[int] = []
        self._freq: list[float] = []
        self._damp: list[float] = []
        self._shape: list[np.ndarray | None] = []
        self._missed: list[int] = []
        self._next = 1

    @property
    def labels(self) -> np.ndarray:
        """Labels of the tracked modes, in tracking order."""
        return np.array(self._labels, dtype=int)

    @property
    def frequencies(self) -> np.ndarray:
        """Latest frequency (Hz) of each tracked mode, aligned with :attr:`labels`."""
        return np.array(self._freq, dtype=float)

    @property
    def dampings(self) -> np.ndarray:
        """Latest damping ratio of each tracked mode, aligned with :attr:`labels`."""
        return np.array(self._damp, dtype=float)

    def state_dict(self) -> dict:
        """Tracked modes as plain lists (copies)."""
        return {
            "labels": list(self._labels),
            "freq": list(self._freq),
            "damp": list(self._damp),
            "shape": [None if s is None else s.copy() for s in self._shape],
            "missed": list(self._missed),
            "next": self._next,
        }

    def load_state_dict(self, state: dict) -> None:
        """Restore the state saved by :meth:`state_dict`."""
        self._labels = [int(v) for v in state["labels"]]
        self._freq = [float(v) for v in state["freq"]]
        self._damp = [float(v) for v in state["damp"]]
        self._shape = [None if s is None else np.array(s) for s in state["shape"]]
        self._missed = [int(v) for v in state["missed"]]
        self._next = int(state["next"])

    def update(self, frequency_hz, damping, shapes=None) -> np.ndarray:
        """Label a new set of modes; returns one label per input mode, in input order.

        Parameters
        ----------
        frequency_hz, damping : array_like
            Shape ``(k,)``.
        shapes : array_like, optional
            Mode shapes as columns, shape ``(n, k)``; enables the MAC test.
        """
        from scipy.optimize import linear_sum_assignment  # here: scipy.optimize loads slowly

        f = np.asarray(frequency_hz, dtype=float).ravel()
        zeta = np.asarray(damping, dtype=float).ravel()
        k = f.size
        if zeta.size != k:
            raise ValueError("frequency_hz and damping must have the same length")
        sh = None
        if shapes is not None:
            sh = np.atleast_2d(np.asarray(shapes))
            if sh.shape[1] != k:
                raise ValueError(f"shapes must have {k} columns, got {sh.shape[1]}")
        out = np.zeros(k, dtype=int)
        matched_new = np.zeros(k, dtype=bool)
        matched_old = np.zeros(len(self._labels), dtype=bool)
        if self._labels and k:
            old_f = np.array(self._freq)
            rel = np.abs(f[:, None] - old_f[None, :]) / np.maximum(old_f[None, :], self.f_floor)
            cost = rel / self.freq_tol
            allowed = rel <= self.freq_tol
            if self.damp_tol > 0:
                old_z = np.array(self._damp)
                dz = np.abs(zeta[:, None] - old_z[None, :])
                cost = cost + np.where(np.isfinite(dz), dz, 0.0) / self.damp_tol
            if sh is not None and self.mac_min > 0:
                macs = np.ones((k, old_f.size))
                for j, s_old in enumerate(self._shape):
                    if s_old is not None and s_old.shape[0] == sh.shape[0]:
                        macs[:, j] = mac_matrix(sh, s_old[:, None])[:, 0]
                cost = cost + (1.0 - macs) / (1.0 - self.mac_min)
                allowed &= macs >= self.mac_min
            big = 1e6 + cost.max()
            rows, cols = linear_sum_assignment(np.where(allowed, cost, big))
            for i, j in zip(rows, cols):
                if allowed[i, j]:
                    out[i] = self._labels[j]
                    matched_new[i] = True
                    matched_old[j] = True
                    self._freq[j] = float(f[i])
                    self._damp[j] = float(zeta[i])
                    self._shape[j] = None if sh is None else sh[:, i].copy()
                    self._missed[j] = 0
        for j in np.nonzero(~matched_old)[0]:
            self._missed[j] += 1
        keep = [j for j in range(len(self._labels)) if self._missed[j] <= self.max_missed]
        for name in ("_labels", "_freq", "_damp", "_shape", "_missed"):
            setattr(self, name, [getattr(self, name)[j] for j in keep])
        for i in sorted(np.nonzero(~matched_new)[0], key=lambda i: f[i]):
            if len(self._labels) >= self.max_tracks:
                worst = int(np.argmax(self._missed))
                for name in ("_labels", "_freq", "_damp", "_shape", "_missed"):
                    getattr(self, name).pop(worst)
            out[i] = self._next
            self._labels.append(self._next)
            self._freq.append(float(f[i]))
            self._damp.append(float(zeta[i]))
            self._shape.append(None if sh is None else sh[:, i].copy())
            self._missed.append(0)
            self._next += 1
        return out
