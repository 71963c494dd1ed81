"""Closed-form Markov chains: cohort traces, steady states, absorption, conversions,
expected outcomes, and state-space expansions (tunnels, counters) for finite memory.

Pure numpy/scipy; knows nothing of scenario files. Inputs come from binding.
"""
from .absorbing import Absorption, absorption, absorption_continuous
from .continuous import rate_matrix, transient, transient_piecewise
from .continuous_outcomes import continuous_transition_value, continuous_value, occupancy
from .convert import (CycleChange, NotATransitionMatrix, change_cycle, naive_probabilities,
                      probabilities_from_rates, probability_to_rate, project_to_simplex,
                      rate_to_probability)
from .counters import counter_expansion, split_counted
from .discrete import cohort_trace, n_step
from .expanded import ExpandedChain
from .discrete_outcomes import (cycle_weights, discount_factors, expected_value, one_off_value,
                       state_time, transition_counts, transition_value)
from .steady import (NoUniqueSteadyState, closed_classes, communicating_classes, period,
                     steady_state, steady_state_continuous)
from .tunnels import tunnel_expansion

__all__ = [
    "Absorption", "absorption", "absorption_continuous",
    "rate_matrix", "transient", "transient_piecewise",
    "continuous_transition_value", "continuous_value", "occupancy",
    "CycleChange", "NotATransitionMatrix", "change_cycle", "naive_probabilities",
    "probabilities_from_rates", "probability_to_rate", "project_to_simplex",
    "rate_to_probability",
    "counter_expansion", "split_counted",
    "cohort_trace", "n_step",
    "ExpandedChain",
    "cycle_weights", "discount_factors", "expected_value", "one_off_value", "state_time",
    "transition_counts", "transition_value",
    "NoUniqueSteadyState", "closed_classes", "communicating_classes", "period",
    "steady_state", "steady_state_continuous",
    "tunnel_expansion",
]
