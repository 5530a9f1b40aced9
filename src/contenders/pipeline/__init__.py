"""Running the trials: the runner, executors and the task loop they share (tasks.py), the
fit store, batch, model recovery and the calibration study."""
