"""The streamed data path in one process against the same path per partition on a local Dask cluster, and what
data-parallel training would have to beat.

Generates an invented Parquet table of deliveries (``bench_stream.generate``: three categorical columns of 50 /
2,000 / 50,000 categories, ten numerics, a target; seeded) cut into ``--files`` files, then in this process:

- ``single``: ids and fingerprint, validate and clean (``stream_clean``), the working set (split, counts,
  statistics, encode), each stage timed;
- ``dask``: the same first pass, then validate and clean one file per task and count and encode one range of
  cleaned rows per task on a ``LocalCluster`` of ``--workers`` processes (one thread each), started and warmed
  before the clock starts; the results are checked equal to the single-process run's;
- ``trainer``: one epoch of the block-fed trainer on the working set (rows/s), and the sizes that decide whether
  splitting training across processes could pay: parameters of the embedding tables and of the dense layers,
  embedding rows touched by one batch.

    python benchmarks/bench_dask_ingest.py [--rows 1000000] [--files 4] [--workers 2] [--folder PATH]

The 1-minute load average is printed beside every figure: on a shared machine compare ratios.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
from bench_stream import generate, spec_dict  # noqa: E402


def _load() -> str:
    return f"load {os.getloadavg()[0]:.1f}"


def split_into_files(source: Path, folder: Path, files: int) -> None:
    import pyarrow.parquet as pq

    table = pq.read_table(source)
    per = -(-table.num_rows // files)
    for i in range(files):
        pq.write_table(table.slice(i * per, per), folder / f"part-{i:03d}.parquet", row_group_size=1 << 18)


def data_path(spec, spec_path: Path, folder: Path, mapper=None) -> tuple:
    from entivec.tasks.ingest.partitioned import stream_clean_parts
    from entivec.tasks.ingest.stream import first_pass, stream_clean
    from entivec.tasks.train.workset import build_working_set

    stages = {}
    first = first_pass(spec, spec_path, folder)
    stages["ids and fingerprint"] = first.seconds
    tick = time.perf_counter()
    streamed = (stream_clean(spec, spec_path, folder, first=first) if mapper is None
                else stream_clean_parts(spec, folder, first, mapper))
    stages["validate and clean"] = time.perf_counter() - tick
    tick = time.perf_counter()
    if mapper is None:
        ws, vocabularies, _ = build_working_set(streamed, spec)
    else:
        ws, vocabularies, _ = build_working_set(streamed, spec, mapper=mapper)
    stages["working set"] = time.perf_counter() - tick
    arrays = {f"{p}-{w}": np.array(a) for p in ("train", "test") for w, a in zip(("ids", "dense", "y"),
                                                                                   ws.arrays(p), strict=True)}
    return stages, streamed, vocabularies, arrays, ws


def _warm(x: int) -> int:
    import entivec.tasks.train.workset  # noqa: F401 - the workers' first import is not the data path's cost

    return x


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--files", type=int, default=4)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--folder", type=Path, default=None)
    args = parser.parse_args()

    import torch
    import yaml
    from threadpoolctl import threadpool_limits

    threadpool_limits(1)
    torch.set_num_threads(1)
    from distributed import Client

    from entivec.flows.parallel import local_cluster
    from entivec.schemas.spec import load_spec
    from entivec.tasks.ingest.partitioned import dask_mapper
    from entivec.tasks.ingest.workdir import working_set
    from entivec.tasks.train.network import EntityNet
    from entivec.tasks.train.streamfit import fit_from_working_set

    base = Path(args.folder or tempfile.mkdtemp(prefix="bench-dask-"))
    data = base / "table"
    data.mkdir(parents=True, exist_ok=True)
    whole = base / "whole.parquet"
    if not any(data.glob("*.parquet")):
        generate(whole, args.rows)
        split_into_files(whole, data, args.files)
        whole.unlink()
    os.environ.setdefault("ENTIVEC_HOME", str(base / "home"))
    spec_path = base / "spec.yaml"
    spec_path.write_text(yaml.safe_dump(spec_dict(str(data / "*.parquet"))), encoding="utf-8")
    spec = load_spec(spec_path)
    print(f"{args.rows:,} rows in {args.files} Parquet files; {args.workers} local Dask workers")

    with working_set("bench", base / "ws-single") as folder:
        single, streamed, vocabularies, reference, ws = data_path(spec, spec_path, folder)
        for stage, seconds in single.items():
            print(f"single  {stage:20s} {seconds:7.1f} s  {args.rows / seconds:>11,.0f} rows/s  {_load()}")
        training = spec.training.model_copy(update={"epochs": 1, "patience": 2, "progress": False})
        cards = [vocabularies[c].size for c in spec.embed_names]
        sizes = [c.resolved_size(vocabularies[c.name].size) for c in spec.columns.embed]
        result = fit_from_working_set(ws, columns=spec.embed_names, cardinalities=cards, sizes=sizes,
                                      training=training, task=spec.target.task)
        rate = result.history[0]["rows_per_second"]
        ledger = streamed.ledger

    with local_cluster(args.workers) as cluster, Client(cluster, timeout=120) as client:
        client.gather(client.map(_warm, range(4 * args.workers), pure=False))
        with working_set("bench", base / "ws-dask") as folder:
            tick = time.perf_counter()
            on_dask, streamed_dask, vocab_dask, arrays, _ = data_path(spec, spec_path, folder,
                                                                   dask_mapper(client, timeout=3600))
            total_dask = time.perf_counter() - tick
    for stage, seconds in on_dask.items():
        print(f"dask    {stage:20s} {seconds:7.1f} s  {args.rows / seconds:>11,.0f} rows/s  "
              f"{single[stage] / seconds:.2f}x  {_load()}")
    print(f"single total {sum(single.values()):.1f} s, dask total {total_dask:.1f} s")
    same = (streamed_dask.ledger == ledger
            and {c: v.categories for c, v in vocab_dask.items()} == {c: v.categories for c, v in vocabularies.items()}
            and all(np.array_equal(reference[k], arrays[k]) for k in reference))
    print(f"dask results equal to the single-process run's: {same}")

    net = EntityNet(cards, sizes, reference["train-dense"].shape[1], spec.training.hidden)
    embedding = sum(c * s for c, s in zip(cards, sizes, strict=True))
    dense = sum(p.numel() for p in net.parameters()) - embedding
    batch = spec.training.batch_size
    touched = sum(len(np.unique(reference["train-ids"][:batch, j])) * s for j, s in enumerate(sizes))
    print(f"trainer: {rate:,.0f} rows/s on one process ({_load()}); batch {batch} rows = "
          f"{1e3 * batch / rate:.2f} ms a step; {len(reference['train-y']):,} training rows = "
          f"{len(reference['train-y']) / rate:.1f} s an epoch")
    print(f"parameters: embedding tables {embedding:,} ({embedding * 4 / 2**20:.1f} MiB float32), dense layers "
          f"{dense:,}; one batch touches {touched:,} embedding values (vocabulary sizes {cards}, vectors {sizes})")


if __name__ == "__main__":
    main()
