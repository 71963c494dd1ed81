"""Hazard families and the times to event they imply.

Each family gives the hazard h(t), the cumulative hazard H(t), the survival S(t) = exp(-H(t))
and the inverse of H on its own clock t (time since entry, time since start or attained age).
The log-normal and the generalised gamma (`log_location`) are families of the distribution
of log T; `TimeScaledHazard` is any family under an accelerated-failure-time effect (a
patient's time ratio). A time to event is drawn by inverting the cumulative hazard (Bender, Augustin & Blettner 2005,
"Generating survival times to simulate Cox proportional hazards models"): given u in (0, 1), a
proportional-hazards multiplier m > 0 and the clock value now = a, the patient having survived
to a (left truncation: the conditional survival is S(a + s) / S(a)), the time from now is the
smallest s >= 0 with m (H(a + s) - H(a)) = -log u.  math.inf means the event never happens.

The multiplier may also grow while the clock runs, m(s) = m0 exp(growth s): proportional
hazards on attained age for a family on another clock (growth = log hazard ratio per time unit
of age).  Then s solves m0 * integral_0^s exp(growth v) h(a + v) dv = -log u.  For a constant
or Gompertz base the integrand is again Gompertz and s has a closed form (Austin 2012,
"Generating survival times to simulate Cox proportional hazards models with time-varying
covariates"); a piecewise-constant base is a chain of Gompertz pieces; the other families are
solved numerically by `solve_growing_numerically`.

Two paths share the same formulas.  Scalar methods take and return Python floats and use only
`math` (the event engine calls them once per transition); `*_array` methods and `sample_times`
take array-likes, broadcast them and return numpy arrays.  For speed the scalar path checks
nothing (t, now >= 0; 0 < u < 1; multiplier > 0); family parameters are checked once, at
construction (ValueError).
"""
from microsim.hazards.base import HazardFamily, solve_growing_numerically
from microsim.hazards.parametric import (ConstantHazard, GompertzHazard, LogLogisticHazard,
                                         WeibullHazard)
from microsim.hazards.log_location import GeneralisedGammaHazard, LogNormalHazard
from microsim.hazards.piecewise import PiecewiseConstantHazard
from microsim.hazards.time_scaled import TimeScaledHazard

__all__ = ["HazardFamily", "ConstantHazard", "WeibullHazard", "GompertzHazard",
           "LogLogisticHazard", "LogNormalHazard", "GeneralisedGammaHazard",
           "PiecewiseConstantHazard", "TimeScaledHazard", "solve_growing_numerically"]
