"""The streamed data path against the whole-table path: wall time per stage and peak memory, side by side.

Generates invented Parquet tables of deliveries (three categorical columns of 50 / 2,000 / 50,000 categories, ten
numerics, a target; seeded) and runs, each in a fresh child process whose peak RSS is read with
``resource.getrusage``:

- ``stream``: streamed ingestion (ids and fingerprint, validate and clean) and the encoded working set
  (split, counts, numeric statistics, encode), then one shuffled pass over the working set's blocks;
- ``whole``: the same steps on a table read whole (read, validate and clean, split, vocabularies, encoder,
  encode), today's path; skipped above ``--whole-max`` rows.

- ``flow``: the whole ``entivec train`` command (streamed ingestion, working set, training, seed check, folds,
  downstream evidence, registration, report) in a fresh project folder, its stage lines (wall time, rows/s) and
  peak RSS of the command's process; ``--flow-epochs`` caps the epochs (the spec's default budget is 30 epochs
  with early stopping, twice with the seed check). ``--no-flow`` skips it.

The streamed run ends with one epoch of training from the working set. Then, on the smallest table, the trainer
fed from the working set's blocks (``tasks/train/streamfit.py``) and the in-memory trainer (``fit_network``)
train the same rows in turn, rows per second side by side.

    python benchmarks/bench_stream.py [--rows 1000000 10000000] [--whole-max 1000000] [--folder PATH]
                                      [--flow-epochs 2] [--no-flow] [--no-fit]

Machine load (1-minute load average) is printed beside every figure: on a shared machine compare ratios.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

CARDINALITIES = {"depot": 50, "product": 2000, "customer": 50000}
NUMERICS = [f"measure_{i}" for i in range(10)]


def spec_dict(path: str) -> dict:
    return {
        "name": "bench-deliveries",
        "source": {"path": path},
        "id_column": "delivery_id",
        "target": {"column": "cost", "task": "regression"},
        "columns": {"embed": [{"name": c, "size_rule": "fourth_root"} for c in CARDINALITIES],
                    "numeric": NUMERICS},
        "split": {"method": "hash", "test_fraction": 0.2, "seed": 0},
        "training": {"threads": 1},
    }


def generate(path: Path, rows: int, seed: int = 0, chunk: int = 1_000_000) -> None:
    """An invented delivery table; the target depends on every category and numeric column."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    effects = {c: rng.normal(0, 1, n) for c, n in CARDINALITIES.items()}
    weights = rng.normal(0, 0.3, len(NUMERICS))
    writer = None
    for start in range(0, rows, chunk):
        n = min(chunk, rows - start)
        columns = {"delivery_id": pa.array([f"d{i:09d}" for i in range(start, start + n)])}
        cost = np.zeros(n)
        for c, k in CARDINALITIES.items():
            # Zipf-like popularity: a few depots, products and customers take most deliveries.
            codes = np.minimum(rng.zipf(1.3, n) - 1, k - 1)
            cost += effects[c][codes]
            labels = np.array([f"{c}-{j:05d}" for j in range(k)], dtype=object)
            columns[c] = pa.DictionaryArray.from_arrays(pa.array(codes.astype(np.int32)),
                                                        pa.array(labels)).cast(pa.string())
        dense = rng.normal(0, 1, (n, len(NUMERICS))).astype(np.float64)
        cost += dense @ weights + rng.normal(0, 0.5, n)
        for j, name in enumerate(NUMERICS):
            columns[name] = pa.array(dense[:, j])
        columns["cost"] = pa.array(cost)
        table = pa.table(columns)
        if writer is None:
            writer = pq.ParquetWriter(path, table.schema)
        writer.write_table(table)
    writer.close()


def _flow_child(data: str, home: str, epochs: int) -> dict:
    """The ``entivec train`` command in this process (its Prefect server is a process of its own): stage lines
    from standard error, peak RSS of this process."""
    import contextlib
    import io

    import yaml

    os.environ["ENTIVEC_HOME"] = home
    os.environ.setdefault("PREFECT_HOME", str(Path(home) / "prefect"))
    spec = spec_dict(data)
    spec["training"].update({"epochs": epochs, "patience": epochs + 1, "progress": False})
    spec_path = Path(home) / "spec.yaml"
    spec_path.write_text(yaml.safe_dump(spec), encoding="utf-8")
    import threading

    from entivec.cli import app

    err = io.StringIO()
    peaks: dict[int, int] = {}  # stage lines printed so far -> the highest RSS seen meanwhile (the next stage's)
    done = threading.Event()

    def sample() -> None:
        while not done.wait(0.05):
            rss = _rss()
            at = err.getvalue().count("\n")
            peaks[at] = max(peaks.get(at, 0), rss)

    sampler = threading.Thread(target=sample, daemon=True)
    tick = time.perf_counter()
    sampler.start()
    with contextlib.redirect_stderr(err):
        try:
            app(["train", str(spec_path)], standalone_mode=False)
        except SystemExit as exit_:
            if exit_.code:
                raise
    done.set()
    sampler.join()
    wall = time.perf_counter() - tick
    lines = err.getvalue().splitlines()
    stage_peaks = {}
    for at, rss in peaks.items():  # a stage's line is printed when it ends: samples before it are its own
        if at < len(lines):
            found = re.match(r"^  (\S.*?)\s+([\d,]+\.\d) s(\s|$)", lines[at])
            if found:
                stage_peaks[found.group(1)] = max(stage_peaks.get(found.group(1), 0), rss)
    stages = {}
    for line in err.getvalue().splitlines():  # progress.py's stage lines: "  name   12.3 s  ..."
        found = re.match(r"^  (\S.*?)\s+([\d,]+\.\d) s(\s|$)", line)
        if found:
            stages[found.group(1)] = float(found.group(2).replace(",", ""))
    return {"stages": stages, "wall": wall, "stage_peaks": stage_peaks,
            "peak_rss_bytes": _peak(), "log": err.getvalue()[-4000:]}


def _rss() -> int:
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    return 0


def _child(mode: str, data: str, home: str) -> dict:
    if mode.startswith("flow"):
        return _flow_child(data, home, int(mode.split(":")[1]))
    os.environ["ENTIVEC_HOME"] = home
    import yaml
    from threadpoolctl import threadpool_limits

    threadpool_limits(1)
    from entivec.schemas.spec import load_spec

    spec_path = Path(home) / "spec.yaml"
    spec_path.write_text(yaml.safe_dump(spec_dict(data)), encoding="utf-8")
    spec = load_spec(spec_path)
    stages: dict[str, float] = {}
    out: dict = {"stages": stages}
    # Everything imported before any clock starts: the stages time work, not imports.
    from entivec.tasks.ingest.clean import validate_and_clean
    from entivec.tasks.ingest.read import read_source
    from entivec.tasks.ingest.split import split_rows
    from entivec.tasks.ingest.stream import stream_clean
    from entivec.tasks.ingest.workdir import size_on_disk, working_set
    from entivec.tasks.train.encoder import FeatureEncoder
    from entivec.tasks.train.streamfit import fit_from_working_set  # noqa: F401 - imported for its cost (torch)
    from entivec.tasks.train.vocabulary import build_vocabularies
    from entivec.tasks.train.workset import build_working_set

    tick = time.perf_counter()
    if mode == "stream":
        with working_set("bench") as folder:
            streamed = stream_clean(spec, spec_path, folder)
            stages.update(streamed.seconds)
            out["peak_after"] = {"ingestion": _peak()}
            tick = time.perf_counter()
            ws, vocabularies, _ = build_working_set(streamed, spec)
            stages["working set"] = time.perf_counter() - tick
            out["peak_after"]["working set"] = _peak()
            tick = time.perf_counter()
            rows = sum(len(block[2]) for block in ws.blocks("train", 1 << 18, seed=0))
            stages["one shuffled pass"] = time.perf_counter() - tick
            tick = time.perf_counter()
            result = _fit("streamed", ws, spec, vocabularies, epochs=1)
            stages["train one epoch (streamed)"] = time.perf_counter() - tick
            out["train_rows_per_s"] = result.history[0]["rows_per_second"]
            out["data_path_peak_rss_bytes"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
            out["working_set_bytes"] = size_on_disk(folder)
            out["rows_used"] = streamed.ledger.rows_used
            out["pass_rows_per_s"] = rows / stages["one shuffled pass"]
    elif mode == "whole":
        raw, files = read_source(spec, spec_path)
        stages["read"] = time.perf_counter() - tick
        tick = time.perf_counter()
        cleaned = validate_and_clean(raw, spec, files)
        stages["validate and clean"] = time.perf_counter() - tick
        tick = time.perf_counter()
        train, test = split_rows(cleaned.frame, spec.split, spec.id_name)
        vocabularies = build_vocabularies(train, spec)
        encoder = FeatureEncoder.fit(train, spec, vocabularies)
        encoded = encoder.transform(train), encoder.transform(test)
        stages["split, vocabularies, encode"] = time.perf_counter() - tick
        out["rows_used"] = cleaned.ledger.rows_used
        out["data_path_peak_rss_bytes"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
        del encoded
    elif mode == "fit":
        with working_set("bench") as folder:
            ws, vocabularies, _ = build_working_set(stream_clean(spec, spec_path, folder), spec)
            rates: dict[str, list[float]] = {"in memory": [], "streamed": []}
            for _ in range(2):  # alternated, so both see the same machine load
                for how in rates:
                    result = _fit(how, ws, spec, vocabularies, epochs=2)
                    rates[how].extend(row["rows_per_second"] for row in result.history)
            out["rates"] = {k: float(np.median(v)) for k, v in rates.items()}
    out["peak_rss_bytes"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    return out


def _peak() -> int:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def _fit(how: str, ws, spec, vocabularies, epochs: int):
    import torch

    from entivec.tasks.train.streamfit import fit_from_working_set
    from entivec.tasks.train.trainer import fit_network

    torch.set_num_threads(1)
    training = spec.training.model_copy(update={"epochs": epochs, "patience": epochs + 1, "progress": False})
    common = dict(columns=spec.embed_names, cardinalities=[vocabularies[c].size for c in spec.embed_names],
                  sizes=[c.resolved_size(vocabularies[c.name].size) for c in spec.columns.embed],
                  training=training, task=spec.target.task)
    if how == "streamed":
        return fit_from_working_set(ws, **common)
    inputs, y = ws.inputs("train")
    return fit_network(inputs, y, **common)


def run_child(mode: str, data: Path, home: Path) -> tuple[dict, float, float]:
    load = os.getloadavg()[0]
    tick = time.perf_counter()
    done = subprocess.run([sys.executable, __file__, "--child", mode, str(data), str(home)], check=True,
                          capture_output=True, text=True)
    wall = time.perf_counter() - tick
    return json.loads(done.stdout.strip().splitlines()[-1]), wall, max(load, os.getloadavg()[0])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, nargs="+", default=[1_000_000, 10_000_000])
    parser.add_argument("--whole-max", type=int, default=1_000_000)
    parser.add_argument("--folder", type=Path, default=None, help="where the tables go (default: a temp folder)")
    parser.add_argument("--no-fit", action="store_true", help="skip the trainer comparison")
    parser.add_argument("--no-flow", action="store_true", help="skip the whole `entivec train` flow")
    parser.add_argument("--flow-epochs", type=int, default=2, help="epochs of the flow's networks (default 2)")
    parser.add_argument("--only-flow", action="store_true", help="run the flow alone, no data-path children")
    parser.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        print(json.dumps(_child(*args.child)))
        return
    folder = args.folder or Path(tempfile.mkdtemp(prefix="bench-stream-"))
    folder.mkdir(parents=True, exist_ok=True)
    gib = 1 << 30
    print(f"cores: {os.cpu_count()}; figures with the 1-minute load average while they ran")
    peaks = {}
    for rows in args.rows:
        data = folder / f"deliveries-{rows}.parquet"
        if not data.exists():
            tick = time.perf_counter()
            generate(data, rows)
            took = time.perf_counter() - tick
            print(f"\n{rows:,} rows: generated {data.stat().st_size / gib:.2f} GiB in {took:.0f} s")
        if not args.no_flow:
            home = Path(tempfile.mkdtemp(prefix="home-flow-", dir=folder))
            flow, wall, load = run_child(f"flow:{args.flow_epochs}", data, home)
            print(f"\n{rows:,} rows, the whole `entivec train` flow ({args.flow_epochs} epoch(s) per network; load "
                  f"{load:.1f}): wall {flow['wall']:.1f} s in the command, {wall:.1f} s with start-up; peak RSS "
                  f"{flow['peak_rss_bytes'] / gib:.2f} GiB")
            for line in flow["log"].splitlines():  # the command's own stage lines: wall time, rows, rows/s
                found = re.match(r"^  (\S.*?)\s+([\d,]+\.\d) s(\s|$)", line)
                if found:
                    peak = flow["stage_peaks"].get(found.group(1))
                    shown = f"{peak / gib:5.2f} GiB" if peak else " " * 9
                    print(f"  {shown} | {line.strip()[:150]}")
            print("  (GiB: the highest RSS sampled every 50 ms during that stage)")
        if args.only_flow:
            continue
        modes = ["stream"] + (["whole"] if rows <= args.whole_max else [])
        results = {}
        for mode in modes:
            home = Path(tempfile.mkdtemp(prefix=f"home-{mode}-", dir=folder))
            results[mode] = run_child(mode, data, home)
        print(f"\n{rows:,} rows        " + "".join(f"{m:>26}" for m in modes))
        stages = list(dict.fromkeys(s for m in modes for s in results[m][0]["stages"]))
        for stage in stages:
            cells = "".join(f"{results[m][0]['stages'].get(stage, float('nan')):>24.1f} s" for m in modes)
            print(f"  {stage:<28}{cells}")
        print("  child wall (incl. start-up)" + "".join(f"{results[m][1]:>24.1f} s" for m in modes))
        print("  peak RSS, data path        " + "".join(
            f"{results[m][0]['data_path_peak_rss_bytes'] / gib:>22.2f} GiB" for m in modes))
        print("  peak RSS, whole child      " + "".join(f"{results[m][0]['peak_rss_bytes'] / gib:>22.2f} GiB"
                                                       for m in modes))
        print("  load while running         " + "".join(f"{results[m][2]:>24.1f}  " for m in modes))
        stream = results["stream"][0]
        print("  stream peak RSS after      " + ", ".join(f"{k}: {v / gib:.2f} GiB"
                                                        for k, v in stream["peak_after"].items()))
        print(f"  working set on disk: {stream['working_set_bytes'] / gib:.2f} GiB; rows used {stream['rows_used']:,}")
        if "whole" in results:
            ratio = stream["data_path_peak_rss_bytes"] / results["whole"][0]["data_path_peak_rss_bytes"]
            print(f"  data-path peak RSS stream / whole: {ratio:.2f} (both processes have torch imported)")
        peaks[rows] = stream["peak_rss_bytes"]
    if len(peaks) > 1:
        smallest = min(peaks)
        for rows, peak in sorted(peaks.items()):
            print(f"stream peak RSS at {rows:,} rows / at {smallest:,} rows: {peak / peaks[smallest]:.2f} "
                  f"(target <= 1.3 at 10 M; <= 4 GiB at 100 M: {peak / gib:.2f} GiB)")
    if args.no_fit or args.only_flow:
        return
    smallest = min(args.rows)
    fit, _, load = run_child("fit", folder / f"deliveries-{smallest}.parquet",
                             Path(tempfile.mkdtemp(prefix="home-fit-", dir=folder)))
    rates = fit["rates"]
    print(f"\ntrainer on {smallest:,} rows' training part (median of 4 epochs each, alternated, load {load:.1f}): "
          f"from the working set's blocks {rates['streamed'] / 1e3:.0f} k rows/s, in memory "
          f"{rates['in memory'] / 1e3:.0f} k rows/s; ratio {rates['streamed'] / rates['in memory']:.2f} "
          f"(target >= 0.8)")


if __name__ == "__main__":
    main()
