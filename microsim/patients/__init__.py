"""Who the simulated patients are and what each one's hazards are multiplied by: the
population generator, covariate multipliers, and a strategy's treatment windows."""
