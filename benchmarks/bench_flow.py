"""What orchestration costs: the whole train flow against the same steps called as plain functions, side by side.

Runs, in one process and on the same generated demo table: the steps directly (warm-up: creates the store,
and its report artifact starts the temporary Prefect server), the flow, then paired runs of the flow and
the steps directly. Prints each wall time and the overhead of the flow over the direct steps.

    python benchmarks/bench_flow.py [--rows 20000] [--repeats 2]
"""

from __future__ import annotations

import argparse
import contextlib
import os
import tempfile
import time
from pathlib import Path


@contextlib.contextmanager
def plain_steps(module):
    """Swap every Prefect task the flow module uses for its plain function, for the duration.

    Covers the tasks the module imports by name and those it reaches through a task module (``drift.``,
    ``audit.``, ...). Cross-fitting needs no swap: called outside a flow run it trains its folds one by one.
    """
    import types

    from prefect import Task

    owners = [module] + [
        obj for obj in vars(module).values()
        if isinstance(obj, types.ModuleType) and obj.__name__.startswith("entivec.tasks.")
    ]
    for owner in owners:  # tasks a module makes on first use (entivec.lazytasks), so that they are swapped too
        for lazy in vars(owner).get("LAZY_TASKS", ()):
            getattr(owner, lazy)
    saved = [(owner, name, obj) for owner in owners for name, obj in vars(owner).items() if isinstance(obj, Task)]
    for owner, name, obj in saved:
        setattr(owner, name, obj.fn)
    try:
        yield
    finally:
        for owner, name, obj in saved:
            setattr(owner, name, obj)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--rows", type=int, default=20_000)
    parser.add_argument("--repeats", type=int, default=2)
    args = parser.parse_args()

    workdir = Path(tempfile.mkdtemp(prefix="entivec-bench-flow-"))
    os.environ["ENTIVEC_HOME"] = str(workdir / "home")
    import entivec.flows.train as flow_module
    from entivec.demo import write_demo

    spec_path = str(write_demo(workdir / "data", rows=args.rows))

    def direct() -> float:
        with plain_steps(flow_module):
            start = time.perf_counter()
            flow_module.train.fn(spec_path)
            return time.perf_counter() - start

    def orchestrated() -> float:
        start = time.perf_counter()
        flow_module.train(spec_path)
        return time.perf_counter() - start

    warm_up = direct()
    first_flow = orchestrated()
    flows, directs = [], []
    for _ in range(args.repeats):
        flows.append(orchestrated())
        directs.append(direct())
    flow_s, direct_s = min(flows), min(directs)
    print(f"rows: {args.rows:,} (demo table); best of {args.repeats} paired runs after a warm-up")
    print(f"steps called directly:           {direct_s:8.2f} s   (warm-up run {warm_up:.2f} s, creates the store)")
    print(f"whole flow, server already up:   {flow_s:8.2f} s")
    # The direct steps publish a Prefect artifact too, so the temporary server may already be up here.
    print(f"whole flow, first call:          {first_flow:8.2f} s")
    print(f"flow overhead (warm):            {flow_s - direct_s:8.2f} s   ratio flow/direct {flow_s / direct_s:.3f}")


if __name__ == "__main__":
    main()
