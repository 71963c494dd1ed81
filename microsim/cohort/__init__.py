"""The analytic counterpart of a bound model: expanded state spaces, cycle matrices,
forward equations, and the tidy tables the cohort commands print."""
