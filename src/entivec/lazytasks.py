"""Prefect tasks made on first use, so a module that defines one for the flows can be imported without Prefect.

A command that only reads (``entivec history``, ``check``, ``report``) imports the modules the flows use too;
defining their tasks at import time would load Prefect (about 2 s) into each of them. A module instead sets

    __getattr__ = tasks_on_first_use(globals(), record_move_task=(record_move, {"name": "record-alias-move"}))

and the task is made, and kept in the module, the first time anything asks for that name (``module.name`` or
``from module import name``). Every such task is uncached (cache keys would hash whole frames). The names are
listed in the module's ``LAZY_TASKS`` for tools that swap tasks for their plain functions.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any


def tasks_on_first_use(namespace: dict[str, Any], **tasks: tuple[Callable, dict[str, Any]]) -> Callable[[str], Any]:
    """A module ``__getattr__`` that makes each named task (function, ``task`` options) when first asked for."""
    namespace["LAZY_TASKS"] = tuple(tasks)

    def __getattr__(attribute: str) -> Any:
        if attribute not in tasks:
            raise AttributeError(f"module {namespace.get('__name__')!r} has no attribute {attribute!r}")
        from prefect import task
        from prefect.cache_policies import NO_CACHE

        function, options = tasks[attribute]
        made = task(cache_policy=NO_CACHE, **options)(function)
        namespace[attribute] = made
        return made

    return __getattr__
