"""Hazards from patient-level data: fit, compare, write the scenario, carry the uncertainty.

`data` reads time-to-event data (right censoring, delayed entry, covariates); `families`
are the scenario's own hazard families with the scales a fit estimates them on;
`likelihood` and `estimate` fit each by maximum likelihood and rank them by AIC;
`kaplan_meier` is the nonparametric curve they are judged against; `curves` the fitted and
simulated curves; `scenario_text` writes the chosen fit as a scenario block, with its
provenance and its covariance as a multivariate normal for the PSA.
"""
