"""From per-patient histories to results: aggregation on the time grid, costs and QALYs,
and the comparison of simulated with analytic results."""
