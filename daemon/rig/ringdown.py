"""The rig's first bending mode in the stream, measured the way a test engineer would: pluck it.

The online identifier reports the modes of its realised transient; to check them the rig needs
its own value of the first bending frequency *in flow*, where the fluid's added mass and the
wake's damping move it far from the in-vacuo cantilever value. The lumped-vortex wake with
amalgamation has no finite eigenproblem to solve exactly, so the value is measured on the
simulator itself: start from the steady aeroelastic state at the operating incidence with the
first modal coordinate displaced, hold the pitch, record the root curvature, and fit

    kappa(t) = c + A exp(-sigma t) cos(omega_d t + phi) + B exp(-lambda t)

(a damped oscillation, the aerodynamic lag's non-oscillatory decay, the steady value) by
nonlinear least squares (``scipy.optimize.curve_fit``, Levenberg-Marquardt) over the first
``fit_s`` seconds after ``skip_s`` (the higher modes have died out by then). The natural frequency
is ``sqrt(sigma^2 + omega_d^2) / 2 pi`` and the damping ratio ``sigma / sqrt(sigma^2 +
omega_d^2)``: the same definitions as the identifier's modes (``daemon/identify/modes.py``), so
the two compare directly. This is the textbook free-decay (log-decrement) measurement, fitted
instead of read from two peaks (e.g. W. T. Thomson, "Theory of Vibration with Applications",
section on logarithmic decrement; from memory).

Check (tests/test_stiffness_step.py): with the fluid's density near zero the fit returns the
Euler-Bernoulli cantilever frequency of R. D. Blevins (1979), table 8-1, and the 2 % structural
damping the modes are given.

On the shipped 0.6 mm strip in the 0.4 m/s stream the first mode is damped so heavily (reduced
frequency about 1.3) that the plucked curvature decays without a swing: the fit puts 6 % of the
amplitude in a small 12-13 Hz ripple and the rest in the non-oscillatory term, and
:func:`fit_decay` refuses (``RingDownError``: the oscillation must carry at least as much as the
non-oscillatory decay) rather than give a frequency for it. The 1.5 mm strip of the
``stiff-strip`` scenario rings at about 6.4 Hz with a damping ratio of about 0.26 (the oscillation
carries more than 99 % of the fitted amplitude).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

__all__ = ["BendingMode", "RingDownError", "ring_down", "first_bending_in_flow"]


class RingDownError(ValueError):
    """The free decay does not show an oscillation that can be fitted."""


@dataclass(frozen=True)
class BendingMode:
    """The first bending mode measured from a free decay."""

    freq_hz: float          # natural frequency sqrt(sigma^2 + omega_d^2) / 2 pi
    damping: float          # damping ratio sigma / sqrt(sigma^2 + omega_d^2)
    damped_hz: float        # omega_d / 2 pi
    fit_residual: float     # rms misfit over the standard deviation of the fitted signal
    stiffness_factor: float
    flow_speed_m_s: float
    alpha_deg: float


def ring_down(sim, alpha_deg: float, kick: float = 0.3, duration_s: float = 3.0):
    """Root curvature after releasing the plate with its first modal coordinate displaced.

    ``sim`` is a :class:`~wingwatch.daemon.rig.plate.PlateSimulator` (its flow speed, stiffness
    factor and added mass as set); it is reset. The displacement is ``kick`` times the steady
    first modal coordinate, or 1e-4 (modal coordinates are tip deflections in metres) when the
    steady one is smaller than that (no flow load). Returns ``(t, kappa_root)``.
    """
    a0 = np.radians(alpha_deg)
    q0 = sim.steady_state(a0)["q"].copy() if sim.flow_speed > 0 else np.zeros(sim.n_modes)
    q0[0] += kick * q0[0] if abs(q0[0]) >= 1e-4 else 1e-4
    sim.reset(a0, q0)
    n = int(round(duration_s / sim.dt_sample)) * sim.numerics.substeps
    a = np.full(n, a0)
    z = np.zeros(n)
    if sim.numerics.substeps > 1:
        _, kappa = sim.run_substeps(a, z, z)
    else:
        _, kappa = sim.run(a, z, z)
    t = np.arange(1, kappa.shape[0] + 1) * sim.dt_sample
    return t, kappa[:, 0]


def _model(t, c, A, sigma, omega, phi, B, lam):
    return c + A * np.exp(-sigma * t) * np.cos(omega * t + phi) + B * np.exp(-lam * t)


def fit_decay(t: np.ndarray, y: np.ndarray, skip_s: float = 0.05,
              fit_s: float = 1.5) -> tuple[float, float, float, float]:
    """Fit the damped oscillation to a free decay: ``(freq_hz, damping, damped_hz, residual)``."""
    from scipy.optimize import curve_fit
    from scipy.signal import find_peaks

    m = (t >= skip_s) & (t <= skip_s + fit_s)
    tm, ym = t[m] - skip_s, y[m]
    settled = float(y[-max(1, y.size // 10):].mean())
    peaks, _ = find_peaks(np.abs(ym - settled))
    if peaks.size < 3:
        raise RingDownError("the free decay has fewer than three extremes: the mode does not ring")
    omega0 = np.pi / float(np.mean(np.diff(tm[peaks[:4]])))
    p0 = [settled, float(ym[0] - settled), 0.2 * omega0, omega0, 0.0, 0.0, 5.0]
    try:
        popt, _ = curve_fit(_model, tm, ym, p0=p0, maxfev=20000)
    except RuntimeError as exc:  # no convergence
        raise RingDownError(f"the damped-oscillation fit did not converge ({exc})") from None
    _, amp, sigma, omega, _, amp_lag, _ = popt
    if not abs(amp) >= abs(amp_lag):
        raise RingDownError(f"the free decay is mostly a non-oscillatory decay (oscillation "
                            f"amplitude {abs(amp):.3g} against {abs(amp_lag):.3g}): the plucked "
                            f"mode does not ring")
    omega = abs(omega)
    wn = float(np.hypot(sigma, omega))
    resid = ym - _model(tm, *popt)
    return (wn / (2.0 * np.pi), float(sigma) / wn, float(omega) / (2.0 * np.pi),
            float(np.sqrt(np.mean(resid ** 2)) / max(float(np.std(ym)), 1e-300)))


def first_bending_in_flow(scenario, stiffness_factor: float = 1.0, alpha_deg: float | None = None,
                          flow_speed_m_s: float | None = None, max_damping: float = 0.5,
                          **fit) -> BendingMode:
    """The first bending mode of ``scenario``'s article in its stream, by a simulated free decay.

    ``alpha_deg`` defaults to the scenario's mean incidence, ``flow_speed_m_s`` to its flow
    speed. Raises :class:`RingDownError` when the decay has no fittable oscillation or its damping
    ratio is above ``max_damping`` (the mode then does not ring and has no frequency worth
    comparing).
    """
    from wingwatch.daemon.rig.source import VirtualRig

    sc = scenario
    if flow_speed_m_s is not None:
        sc = replace(sc, flow_speed_m_s=float(flow_speed_m_s))
    alpha = sc.motion.mean_deg if alpha_deg is None else float(alpha_deg)
    sim = VirtualRig(sc, seed=0).make_simulator()
    sim.set_parameters(stiffness_factor=float(stiffness_factor))
    t, y = ring_down(sim, alpha)
    f, zeta, fd, res = fit_decay(t, y, **fit)
    if not zeta <= max_damping:
        raise RingDownError(f"the first bending mode's damping ratio in the stream is {zeta:.2f} "
                            f"(above {max_damping}): it does not ring")
    return BendingMode(f, zeta, fd, res, float(stiffness_factor), sc.flow_speed_m_s, alpha)
