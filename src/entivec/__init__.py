"""entivec: retrain, evaluate, version and apply entity embeddings of high-cardinality categories.

Importing entivec changes nothing in the process: no environment variable is set and no folder is made. The
`entivec` command applies the settings (team settings file, quiet local defaults for Prefect and MLflow) when it
starts; a script that drives the flows itself calls :func:`entivec.settings.apply_environment_defaults` before
it imports Prefect or any ``entivec.flows`` module.
"""

__version__ = "0.1.0"
