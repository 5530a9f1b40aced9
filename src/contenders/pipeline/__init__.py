"""Running the trials: the runner, executors, the fit store, batch and recovery."""
