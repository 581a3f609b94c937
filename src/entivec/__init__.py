"""entivec: retrain, evaluate, version and apply entity embeddings of high-cardinality categories."""

from entivec.settings import apply_environment_defaults

__version__ = "0.1.0"

# Prefect and MLflow read their settings when first imported, so the embedded defaults must be in place
# before any sub-package (which imports them) is loaded.
apply_environment_defaults()
