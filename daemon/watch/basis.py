"""Window estimates of the interpretable columns on a frozen transient basis (the watchers' input).

The drift watchers compare estimates from successive slow-update windows with a baseline, so the
estimates must keep the same expectation while nothing physical changes. The identifier's own
window estimate holds the transient output matrix at the fast layer's value, in the realisation
in service; over a 2 s window with little excitation below 0.1 Hz the split between the
quasi-steady column and the slow transient states is not unique, so whenever the slow layer
picks another realisation (another rank or basis) that estimate moves by several per cent with no
change in the article (measured on the rig: about 10 % between rank 5 and rank 10). A drifting
gauge zero also enters the slow layer's fit and moves the realisation.

Here the transient part is frozen instead: one realisation ``(A, B, C)`` is fixed when a baseline
starts, its states are run on the pitch rate, and over each window the columns are the ordinary
least-squares solution of::

    dy(k) - C x(k)  =  [a(k) - a_c, alpha_dot(k), alpha_ddot(k), 1]  @  theta      (per output)
      (n x 2)            (n x 4)                                        (4 x 2)

    x(k+1) = A x(k) + B alpha_dot(k)

``theta`` rows: the gain to alpha about ``a_c`` (the quasi-steady column), the rate and
added-mass columns, and the **level**: the output at ``a = a_c``, the operating point in use.
Centring alpha at the operating point makes the level nearly uncorrelated with the gain (with
the reference's ``alpha0`` one degree away the two estimates correlate at -0.98). Nothing in
this regression depends on the slow layer, so a change of the estimates means a change of the
data. The window sums are the normal equations, accumulated block by block (bounded state).

Examples
--------
>>> import numpy as np
>>> w = FrozenBasisWindow()
>>> w.freeze(np.zeros((0, 0)), np.zeros(0), np.zeros((2, 0)), a_c=0.0)
>>> rng = np.random.default_rng(0)
>>> a = rng.standard_normal(400); ad = rng.standard_normal(400); add = rng.standard_normal(400)
>>> dy = np.column_stack([3.0 * a + 0.1, 10.0 * a - 0.2])
>>> w.add(a, ad, add, dy, np.ones(400, bool))
>>> G, b, n, rate_rms = w.take()
>>> np.round(solve_window(G, b)[[0, 3]], 6).tolist()
[[3.0, 10.0], [0.1, -0.2]]
"""

from __future__ import annotations

from typing import Any

import numpy as np

from wingwatch.daemon.identify.interpretable import simulate_states

__all__ = ["FrozenBasisWindow", "solve_window", "level_only"]

ROWS = ("gain", "rate", "added_mass", "level")


def solve_window(G: np.ndarray, b: np.ndarray) -> np.ndarray | None:
    """Least-squares columns from the normal equations ``G theta = b`` (None if singular).

    A relative ridge of 1e-12 of the mean diagonal keeps the Cholesky factor defined; it changes
    nothing at the precision of the data.
    """
    p = G.shape[0]
    Gr = G + 1e-12 * np.trace(G) / p * np.eye(p)
    try:
        cf = np.linalg.cholesky(Gr)
    except np.linalg.LinAlgError:
        return None
    return np.linalg.solve(cf.T, np.linalg.solve(cf, b))


def level_only(g_level: np.ndarray, b_level: np.ndarray, theta_fixed: np.ndarray) -> np.ndarray:
    """The level alone, with the gain, rate and added-mass rows held at ``theta_fixed``.

    ``g_level`` and ``b_level`` are the level rows of the normal equations (``G[3]``, whose last
    entry is the sample count, and ``b[3]``): the least-squares offset of what the fixed columns
    leave, ``(b_level - g_level[:3] @ theta_fixed[:3]) / g_level[3]``, i.e. the window mean of the
    residual of the fixed columns. It needs no motion in the window (alpha may hold).
    """
    n = g_level[3]
    if n <= 0:
        return np.full(np.shape(b_level)[-1], np.nan)
    return (b_level - g_level[:3] @ theta_fixed[:3]) / n


class FrozenBasisWindow:
    """Normal equations of the window regression above, on a transient basis frozen by
    :meth:`freeze` (explicit state; see the module docstring)."""

    def __init__(self) -> None:
        self.reset()

    def reset(self) -> None:
        self.A: np.ndarray | None = None
        self.B = np.zeros(0)
        self.C = np.zeros((2, 0))
        self.x = np.zeros(0)
        self.a_c = 0.0
        self._clear()

    def _clear(self) -> None:
        self.G = np.zeros((4, 4))
        self.b = np.zeros((4, 2))
        self.n = 0
        self.rate_sq = 0.0

    @property
    def frozen(self) -> bool:
        return self.A is not None

    @property
    def rank(self) -> int:
        return 0 if self.A is None else int(self.A.shape[0])

    def freeze(self, A: np.ndarray, B: np.ndarray, C: np.ndarray, a_c: float,
               x0: np.ndarray | None = None) -> None:
        """Fix the transient basis, its present state ``x0`` (zeros if not given; a state
        carried by a simulation of the same realisation on the same data avoids a start-up
        transient) and the alpha centre; the window sums start afresh."""
        A = np.array(A, dtype=float)
        r = A.shape[0]
        self.A = A.reshape(r, r)
        self.B = np.array(B, dtype=float).reshape(r)
        self.C = np.array(C, dtype=float).reshape(2, r)
        self.x = np.zeros(r) if x0 is None else np.array(x0, dtype=float).reshape(r)
        self.a_c = float(a_c)
        self._clear()

    def restart(self) -> None:
        """After a gap or a source restart: the transient states start from rest (as the
        identifier's do)."""
        self.x = np.zeros(self.rank)

    def add(self, a: np.ndarray, ad: np.ndarray, add: np.ndarray, dy: np.ndarray,
            ok: np.ndarray) -> None:
        """One block of aligned samples (deviations about the identifier's operating point)."""
        if self.A is None:
            return
        X, self.x = simulate_states(self.A, self.B, ad, self.x)
        if not np.any(ok):
            return
        z = dy[ok] - X[ok] @ self.C.T
        phi = np.column_stack([a[ok] - self.a_c, ad[ok], add[ok], np.ones(int(np.count_nonzero(ok)))])
        self.G += phi.T @ phi
        self.b += phi.T @ z
        self.n += phi.shape[0]
        self.rate_sq += float(np.sum(ad[ok] ** 2))

    def take(self) -> tuple[np.ndarray, np.ndarray, int, float]:
        """The window's normal equations ``(G, b)``, its sample count and pitch-rate rms (rad/s);
        the window sums start afresh."""
        out = (self.G, self.b, self.n, float(np.sqrt(self.rate_sq / self.n)) if self.n else 0.0)
        self._clear()
        return out

    def state_dict(self) -> dict[str, Any]:
        return {"A": None if self.A is None else self.A.copy(), "B": self.B.copy(),
                "C": self.C.copy(), "x": self.x.copy(), "a_c": self.a_c, "G": self.G.copy(),
                "b": self.b.copy(), "n": self.n, "rate_sq": self.rate_sq}

    def load_state_dict(self, st: dict[str, Any]) -> None:
        self.reset()
        if st["A"] is not None:
            A = np.asarray(st["A"], dtype=float)
            r = int(np.size(A) ** 0.5 + 0.5)
            self.A = A.reshape(r, r).copy()
            self.B = np.asarray(st["B"], dtype=float).reshape(r).copy()
            self.C = np.asarray(st["C"], dtype=float).reshape(2, r).copy()
            self.x = np.asarray(st["x"], dtype=float).reshape(r).copy()
        self.a_c = float(st["a_c"])
        self.G = np.asarray(st["G"], dtype=float).reshape(4, 4).copy()
        self.b = np.asarray(st["b"], dtype=float).reshape(4, 2).copy()
        self.n = int(st["n"])
        self.rate_sq = float(st["rate_sq"])
