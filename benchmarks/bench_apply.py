"""Speed and memory of applying vectors: string -> id options, the apply path vs the straightforward way vs memory
bandwidth, and the apply job's peak memory on a file ten chunks long vs one chunk. All figures from one run.

    python benchmarks/bench_apply.py            # 10,000,000 values of a 50,000-category column, 16-d vectors
    python benchmarks/bench_apply.py --quick    # a smoke run (1,000,000 values, smaller memory files)
    python benchmarks/bench_apply.py --only throughput   # one part: ids, throughput, memory or files

Targets (2 cores): the apply path >= 20,000,000 rows/s on string input and >= 15x the straightforward
``Series.map`` over a dict of lists; the apply job's peak memory on a 10-chunk file within 2x of one chunk's.
The data are invented (category names ``c000123``) and seeded.
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from entivec.schemas.vector_set import VectorSet
from entivec.schemas.vocabulary import UNKNOWN, Vocabulary
from entivec.tasks.apply.batch import ChunkBuffers, append_vectors, apply_file
from entivec.tasks.apply.lookup import ColumnLookup
from entivec.tasks.apply.served import lookup_frame

COLUMN = "store"
UNSEEN_SHARE = 0.01


def best_of(repeats: int, call) -> float:
    """Fastest wall time of ``repeats`` calls (the least disturbed by other work on the machine)."""
    best = float("inf")
    for _ in range(repeats):
        gc.collect()
        started = time.perf_counter()
        call()
        best = min(best, time.perf_counter() - started)
    return best


def make_vector_set(categories: int, dim: int, seed: int = 0) -> VectorSet:
    rng = np.random.default_rng(seed)
    names = [f"c{i:06d}" for i in range(categories)]
    counts = rng.integers(1, 1_000, size=categories).tolist()
    vocab = Vocabulary(COLUMN, [UNKNOWN, *names], [0, *counts])
    matrix = rng.standard_normal((categories + 1, dim)).astype(np.float32)
    return VectorSet({COLUMN: vocab}, {COLUMN: matrix}, {"model_name": "bench"})


def make_values(rows: int, categories: int, seed: int = 1) -> np.ndarray:
    """Category strings (object array): uniform over the categories, 1% never seen in training."""
    rng = np.random.default_rng(seed)
    pool = np.array([f"c{i:06d}" for i in range(categories)] + [f"n{i:06d}" for i in range(1_000)], dtype=object)
    codes = rng.integers(0, categories, size=rows)
    unseen = rng.random(rows) < UNSEEN_SHARE
    codes[unseen] = categories + rng.integers(0, 1_000, size=int(unseen.sum()))
    return pool[codes]


def measure_bandwidth(megabytes: int = 1024) -> float:
    """Bytes per second that one big np.copyto moves (each byte read once and written once)."""
    src = np.ones(megabytes * (1 << 20) // 8, dtype=np.float64)
    dst = np.zeros_like(src)
    seconds = best_of(5, lambda: np.copyto(dst, src))
    return src.nbytes / seconds


def fresh(lookup: ColumnLookup) -> ColumnLookup:
    """The lookup with its last-dictionary memo cleared, so a repeat pays for mapping the dictionary again."""
    lookup._last_dictionary = None
    return lookup


def by_dictionary(index: pd.Index, array: pa.DictionaryArray) -> np.ndarray:
    """The plain use of a dictionary: look up its (few) values, then index by the rows' dictionary indices."""
    mapped = index.get_indexer(array.dictionary.to_numpy(zero_copy_only=False)) + 1
    return np.append(mapped, 0)[pc.fill_null(array.indices, -1).to_numpy()]


def string_to_id_options(values: np.ndarray, vocab: Vocabulary, lookup: ColumnLookup, repeats: int) -> None:
    n = len(values)
    known = vocab.categories[1:]
    obj = pd.Series(values, dtype=object)
    arrow_strings = pd.Series(values, dtype=pd.ArrowDtype(pa.string()))
    default_strings = pd.Series(values, dtype=str)
    plain = pa.array(values, type=pa.string())
    dictionary = plain.dictionary_encode()
    obj_index = pd.Index(np.array(known, dtype=object), dtype=object)
    arrow_index = pd.Index(known, dtype=pd.ArrowDtype(pa.string()))
    value_set = pa.array(known, type=pa.string())
    options = {
        "vocabulary.encode (object; the one spelling, plain)": lambda: vocab.encode(obj),
        "Index[object].get_indexer(object)": lambda: obj_index.get_indexer(obj),
        "Index[string[pyarrow]].get_indexer(string[pyarrow])": lambda: arrow_index.get_indexer(arrow_strings),
        "pd.Categorical(values).codes, categories mapped": lambda: lookup.ids(obj.astype("category")),
        "pyarrow.compute.index_in(string array)": lambda: pc.index_in(plain, value_set=value_set),
        "dictionary: get_indexer on the dictionary, take indices": lambda: by_dictionary(obj_index, dictionary),
        "ColumnLookup.ids(object Series)  [transformer]": lambda: lookup.ids(obj),
        "ColumnLookup.ids(string[pyarrow] Series)": lambda: lookup.ids(arrow_strings),
        "ColumnLookup.ids(pandas 3 default str Series)": lambda: lookup.ids(default_strings),
        "ColumnLookup.ids(dictionary array)  [apply job]": lambda: fresh(lookup).ids(dictionary),
    }
    print(f"\nstring -> id, {n:,} values ({len(known):,} categories, {UNSEEN_SHARE:.0%} unseen):")
    for name, call in options.items():
        seconds = best_of(repeats, call)
        print(f"  {name:<55s} {n / seconds / 1e6:8.1f} M rows/s  ({load()})")


def throughput(values: np.ndarray, vector_set: VectorSet, lookup: ColumnLookup, chunk_rows: int, repeats: int):
    n = len(values)
    dim = vector_set.dimension(COLUMN)
    # the apply job's input as the readers hand it over: dictionary-encoded chunks of the category column
    plain = pa.array(values, type=pa.string())
    batches = [
        pa.record_batch([plain.slice(s, chunk_rows).dictionary_encode()], names=[COLUMN])
        for s in range(0, n, chunk_rows)
    ]
    lookups = {COLUMN: lookup}
    buffers = ChunkBuffers()

    def apply_path():
        fresh(lookup)
        for batch in batches:
            append_vectors(batch, lookups, buffers=buffers)

    apply_s = best_of(repeats, apply_path)

    frame = pd.DataFrame({COLUMN: pd.Series(values, dtype=object)})
    pandas_s = best_of(repeats, lambda: lookup_frame(vector_set, frame, lookups=lookups))
    str_frame = pd.DataFrame({COLUMN: pd.Series(values, dtype=str)})
    str_s = best_of(repeats, lambda: lookup_frame(vector_set, str_frame, lookups=lookups))

    class Lists(dict):
        def __missing__(self, key):
            return self[UNKNOWN]

    as_lists = Lists(zip(vector_set.vocabularies[COLUMN].categories, vector_set.vectors[COLUMN].tolist(), strict=True))
    series = pd.Series(values, dtype=object)
    naive_s = best_of(1, lambda: np.array(series.map(as_lists).tolist(), dtype=np.float32))

    # the three ways agree on every row
    naive = np.array(series.map(as_lists).tolist(), dtype=np.float32)
    applied = np.hstack([append_vectors(b, lookups)[0].to_pandas().iloc[:, 1:].to_numpy().T for b in batches[:1]])
    assert np.array_equal(applied.T, naive[: len(applied.T)]), "apply path differs from the straightforward way"
    assert np.array_equal(lookup_frame(vector_set, frame, lookups=lookups).to_numpy(), naive)

    bandwidth = measure_bandwidth()
    bytes_per_row = dim * 4
    bound = bandwidth / bytes_per_row
    print(f"\nvalues -> {dim}-d float32 vectors, {n:,} rows (no file I/O), {os.cpu_count()} cores:")
    print(f"  {'apply path (dictionary chunks -> Arrow vector columns)':<55s} {n / apply_s / 1e6:8.1f} M rows/s  "
          f"({load()})")
    print(f"  {'pandas path (object strings -> DataFrame)':<55s} {n / pandas_s / 1e6:8.1f} M rows/s  ({load()})")
    print(f"  {'pandas path (pandas 3 str strings -> DataFrame)':<55s} {n / str_s / 1e6:8.1f} M rows/s  ({load()})")
    print(f"  {'straightforward Series.map(dict of lists)':<55s} {n / naive_s / 1e6:8.1f} M rows/s  ({load()})")
    print(f"  {'memory-bandwidth bound':<55s} {bound / 1e6:8.1f} M rows/s"
          f"  (np.copyto {bandwidth / 1e9:.1f} GB/s / {bytes_per_row} bytes written per row)")
    print(f"  apply path / straightforward: {naive_s / apply_s:6.1f}x   (target >= 15x)")
    print(f"  pandas path / straightforward: {naive_s / pandas_s:5.1f}x (object), {naive_s / str_s:5.1f}x (str)")
    print(f"  apply path / bandwidth bound: {bound and (n / apply_s) / bound:6.0%}")
    verdict = "met" if n / apply_s >= 20e6 and naive_s / apply_s >= 15 else "NOT met"
    print(f"  target >= 20 M rows/s and >= 15x on string input: {verdict}")


# --- memory: a child process per file, so each peak is its own ------------------------------------------------


def _rss_kib(field: str) -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1])
    raise RuntimeError(f"{field} not in /proc/self/status")


def memory_child(folder: str, source: str, chunk_rows: int) -> None:
    vector_set = VectorSet.load(folder)
    out = Path(source).with_suffix(".out.parquet")
    gc.collect()
    Path("/proc/self/clear_refs").write_text("5")  # reset the peak (VmHWM) to the current resident size
    base = _rss_kib("VmRSS")
    result = apply_file(
        model_name="bench", version="1", run_id="bench", vector_set=vector_set, input_path=source,
        output_path=out, chunk_rows=chunk_rows,
    )
    peak = _rss_kib("VmHWM")
    out.unlink()
    print(json.dumps({"rows": result.rows, "chunks": result.chunks, "base_kib": base, "peak_kib": peak,
                      "seconds": result.seconds}))


def write_table(path: Path, rows: int, categories: int, fmt: str, seed: int) -> None:
    rng = np.random.default_rng(seed)
    step = 1_000_000
    if fmt == "parquet":
        writer = None
        for start in range(0, rows, step):
            n = min(step, rows - start)
            table = pa.table({
                COLUMN: pa.array(make_values(n, categories, seed + start), type=pa.string()),
                "amount": rng.gamma(2.0, 10.0, n), "units": rng.integers(1, 50, n),
            })
            writer = writer or pq.ParquetWriter(path, table.schema)
            writer.write_table(table)  # pyarrow's default row-group size, whatever the chunk size
        writer.close()
    else:
        with path.open("w") as fh:
            fh.write(f"{COLUMN},amount,units\n")
            for start in range(0, rows, step):
                n = min(step, rows - start)
                pd.DataFrame({COLUMN: make_values(n, categories, seed + start), "amount": rng.gamma(2.0, 10.0, n),
                              "units": rng.integers(1, 50, n)}).to_csv(fh, header=False, index=False)


def memory(vector_set: VectorSet, categories: int, chunk_rows: int) -> None:
    print(f"\npeak memory of the apply job (resident set above its start), chunk = {chunk_rows:,} rows:")
    with tempfile.TemporaryDirectory() as tmp:
        folder = vector_set.save(Path(tmp) / "vectors")
        for fmt in ("parquet", "csv"):
            peaks = {}
            for chunks in (1, 10):
                path = Path(tmp) / f"t{chunks}.{fmt}"
                write_table(path, chunks * chunk_rows, categories, fmt, seed=chunks)
                child = subprocess.run(
                    [sys.executable, __file__, "--memory-child", str(folder), str(path), str(chunk_rows)],
                    capture_output=True, text=True, check=True,
                )
                stats = json.loads(child.stdout.strip().splitlines()[-1])
                peaks[chunks] = (stats["peak_kib"] - stats["base_kib"]) / 1024
                print(f"  {fmt:<8s} {stats['rows']:>12,} rows in {stats['chunks']:>3} chunk(s): "
                      f"+{peaks[chunks]:7.0f} MiB peak, {path.stat().st_size / 2**20:7.0f} MiB file, "
                      f"{stats['rows'] / stats['seconds'] / 1e6:5.2f} M rows/s with file I/O  ({load()})")
                path.unlink()
            ratio = peaks[10] / peaks[1]
            verdict = "met" if ratio <= 2 else "NOT met"
            print(f"  {fmt:<8s} 10-chunk file / one chunk: {ratio:.2f}x  (target <= 2x: {verdict})")


def load() -> str:
    """The machine's 1-minute load average, printed beside each figure (2 shared cores: above 2 is contention)."""
    return f"load {os.getloadavg()[0]:.1f}"


def files(vector_set: VectorSet, categories: int, rows: int, repeats: int) -> None:
    """The whole job on a file, and what its newer duties cost inside it, side by side in one run: the CSV row
    count that gives the progress a real total (one extra read of the file), and casting the category column
    back from the dictionary it is read as to the text the input had."""
    from entivec.tasks.apply.inputs import csv_rows

    print(f"\nthe apply job on a file, {rows:,} rows, {categories:,} categories (best of {repeats}):")
    with tempfile.TemporaryDirectory() as tmp:
        for fmt in ("csv", "parquet"):
            path = Path(tmp) / f"t.{fmt}"
            write_table(path, rows, categories, fmt, seed=3)
            out = Path(tmp) / "out.parquet"

            def job(path=path, out=out):
                apply_file(model_name="bench", version="1", run_id="bench", vector_set=vector_set,
                           input_path=path, output_path=out, chunk_rows=1_000_000)

            job_s = best_of(repeats, job)
            print(f"  {fmt:<8s} whole job                      {job_s:7.3f} s  {rows / job_s / 1e6:6.2f} M rows/s  "
                  f"({load()})")
            if fmt == "csv":
                count_s = best_of(repeats, lambda path=path: csv_rows(path))
                print(f"  {fmt:<8s} row count for the total        {count_s:7.3f} s  "
                      f"= {count_s / job_s:6.1%} of the job  ({load()})")
            column = pq.read_table(out, columns=[COLUMN]).column(COLUMN)
            encoded = pc.dictionary_encode(column)
            cast_s = best_of(repeats, lambda encoded=encoded: [c.cast(pa.string()) for c in encoded.chunks])
            print(f"  {fmt:<8s} category column back to text   {cast_s:7.3f} s  "
                  f"= {cast_s / job_s:6.1%} of the job  ({load()})")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smoke run: 1,000,000 values, smaller files")
    parser.add_argument("--rows", type=int, default=None)
    parser.add_argument("--categories", type=int, default=50_000)
    parser.add_argument("--dim", type=int, default=16)
    parser.add_argument("--chunk-rows", type=int, default=None, help="chunk size of the memory test")
    parser.add_argument("--only", choices=("ids", "throughput", "memory", "files"), help="run one part only")
    parser.add_argument("--memory-child", nargs=3, metavar=("VECTORS", "SOURCE", "CHUNK"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.memory_child:
        folder, source, chunk = args.memory_child
        memory_child(folder, source, int(chunk))
        return
    rows = args.rows or (1_000_000 if args.quick else 10_000_000)
    chunk_rows = args.chunk_rows or (100_000 if args.quick else 1_000_000)
    repeats = 2 if args.quick else 3
    vector_set = make_vector_set(args.categories, args.dim)
    lookup = ColumnLookup(COLUMN, vector_set.vocabularies[COLUMN], vector_set.vectors[COLUMN])
    values = make_values(rows, args.categories)
    if args.only in (None, "ids"):
        string_to_id_options(values, vector_set.vocabularies[COLUMN], lookup, repeats)
    if args.only in (None, "throughput"):
        throughput(values, vector_set, lookup, chunk_rows=1_000_000, repeats=repeats)
    if args.only in (None, "memory"):
        memory(vector_set, args.categories, chunk_rows)
    if args.only in (None, "files"):
        files(vector_set, args.categories, min(rows, 4_000_000), repeats)


if __name__ == "__main__":
    main()
