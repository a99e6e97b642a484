"""Running a study: the Optuna storage, one worker's loop, liveness, worker processes, the run."""
