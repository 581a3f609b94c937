"""One step each: Prefect tasks around plain functions that tests call directly."""
