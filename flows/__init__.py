"""The verbs a user runs or schedules: train, promote, rollback, apply."""
