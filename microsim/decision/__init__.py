"""The decision problem: strategies on the same patients, incremental analysis and
economics."""
