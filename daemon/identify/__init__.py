"""Identification maths: ERA, OKID, recursive least squares, modes (pure functions, estimators).

Modules, one per method: :mod:`.era` (Juang & Pappa 1985), :mod:`.okid` (Juang, Phan, Horta &
Longman 1993), :mod:`.rls` (Ljung & Soderstrom 1983, directional forgetting after Kulhavy 1987),
:mod:`.modes` (modal parameters, MAC of Allemang & Brown 1982), :mod:`.differentiate`
(Savitzky & Golay 1964) and :mod:`.interpretable` (the lift-and-curvature model form).
"""

from wingwatch.daemon.identify.differentiate import DelayLine, SavgolDifferentiator, differentiate
from wingwatch.daemon.identify.era import Realisation, choose_rank, era, markov_of
from wingwatch.daemon.identify.interpretable import (
    InterpretableModel,
    fit_interpretable,
    regressor,
    simulate_states,
)
from wingwatch.daemon.identify.modes import ModeTracker, mac, modal_parameters
from wingwatch.daemon.identify.okid import observer_markov, system_markov
from wingwatch.daemon.identify.rls import RecursiveLeastSquares, forgetting_factor

__all__ = [
    "DelayLine",
    "InterpretableModel",
    "ModeTracker",
    "Realisation",
    "RecursiveLeastSquares",
    "SavgolDifferentiator",
    "choose_rank",
    "differentiate",
    "era",
    "fit_interpretable",
    "forgetting_factor",
    "mac",
    "markov_of",
    "modal_parameters",
    "observer_markov",
    "regressor",
    "simulate_states",
    "system_markov",
]
