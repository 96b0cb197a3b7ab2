"""The audit engine: a task or a dataset, a reference, a solver under test, metrics, verdicts."""
