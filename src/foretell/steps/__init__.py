"""The analysis steps: each holds its metrics and orchestration and returns a Result."""
