"""Where versions registered before the stage rooms find their lookup model: the code now lives in ``apply.lookup``.

A registered lookup model is code (``apply/lookup_model_entry.py`` copied into the version), and the copies
made by earlier releases import ``entivec.tasks.lookup_model``; this name keeps those versions loadable.
"""

from entivec.tasks.apply.served import VectorLookupModel

__all__ = ["VectorLookupModel"]
