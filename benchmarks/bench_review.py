"""How the review page scales with the number of categories: build time, file size, time to usable, search time.

    python benchmarks/bench_review.py            # 1,000, 10,000 and 50,000 categories of 16-d vectors
    python benchmarks/bench_review.py --quick    # 1,000 and 10,000 only

Per size, side by side in one run: building the page's data (exact neighbours, the map) and the HTML; the file's
size; the time from opening the file in headless chromium to the page being ready; typing a category and getting
its neighbour table. Each figure is printed with the machine's 1-minute load average beside it, and the last
column is the ratio to the smallest size. Target (2 cores, quiet machine): 50,000 categories usable in under
3 s. Needs the machine's chromium (``apt-get install chromium``) and the test extra (playwright). Threads are
set to 1. The data are invented and seeded: depot codes ``depot-000123`` with random counts and vectors.
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from entivec.schemas.vector_set import VectorSet
from entivec.schemas.vocabulary import UNKNOWN, Vocabulary
from entivec.tasks.present.review import review_data
from entivec.tasks.present.review_page import review_page


def make_vector_set(categories: int, dim: int, seed: int = 0) -> VectorSet:
    rng = np.random.default_rng(seed)
    names = [f"depot-{i:06d}" for i in range(categories)]
    counts = (rng.pareto(1.2, size=categories) * 20 + 1).astype(int).tolist()  # a long tail of rare depots
    vocab = Vocabulary("depot", [UNKNOWN, *names], [0, *counts])
    return VectorSet({"depot": vocab}, {"depot": rng.standard_normal((categories + 1, dim)).astype(np.float32)})


def load() -> str:
    return f"load {os.getloadavg()[0]:.1f}"


def chromium_binary() -> str:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        found = shutil.which(name)
        if found:
            return found
    sys.exit("no chromium on this machine: apt-get install chromium")


def measure(browser, categories: int, dim: int, folder: Path) -> dict:
    vs = make_vector_set(categories, dim)
    started = time.perf_counter()
    data = review_data("bench", "1", vs, production=None, production_version=None, groups={}, neighbours=10,
                       facts=[("model", "bench")])
    path = folder / f"review-{categories}.html"
    path.write_text(review_page(f"{categories:,} categories", data, []), encoding="utf-8")
    out = {"build": (time.perf_counter() - started, load()), "size_mb": path.stat().st_size / 1e6}
    page = browser.new_page(viewport={"width": 1280, "height": 900})
    started = time.perf_counter()
    page.goto(path.resolve().as_uri(), wait_until="load")
    page.wait_for_function("window.entivecReview && window.entivecReview.ready", timeout=120_000)
    out["ready"] = (time.perf_counter() - started, load())
    out["script_s"] = page.evaluate("window.entivecReview.setupMs") / 1000  # of it: the page's own script
    probe = f"depot-{categories // 2:06d}"
    started = time.perf_counter()
    page.fill("#search", probe)
    page.press("#search", "Enter")
    page.wait_for_selector("#neighbours tbody tr")
    out["search"] = (time.perf_counter() - started, load())
    page.close()
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--dim", type=int, default=16)
    args = parser.parse_args()
    sizes = [1_000, 10_000] if args.quick else [1_000, 10_000, 50_000]
    from playwright.sync_api import sync_playwright

    results = {}
    with threadpool_limits(1), tempfile.TemporaryDirectory() as tmp, sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=chromium_binary(), headless=True, args=["--no-sandbox"])
        try:
            for n in sizes:
                results[n] = measure(browser, n, args.dim, Path(tmp))
        finally:
            browser.close()
    base = results[sizes[0]]
    print(f"review page, {args.dim}-d vectors, 10 neighbours; ratio = this size / {sizes[0]:,} categories")
    print(f"{'categories':>10}  {'file MB':>8}  {'build s':>18}  {'ready s':>18}  {'(script s)':>10}  "
          f"{'search s':>18}  {'ratio build/ready/search':>26}")
    for n in sizes:
        r = results[n]
        ratios = "/".join(f"{r[key][0] / base[key][0]:.1f}" for key in ("build", "ready", "search"))
        cells = [f"{r[key][0]:>7.2f} ({r[key][1]})" for key in ("build", "ready", "search")]
        cells.insert(2, f"{r['script_s']:>10.2f}")
        print(f"{n:>10,}  {r['size_mb']:>8.1f}  " + "  ".join(cells) + f"  {ratios:>26}")
    big = results[sizes[-1]]["ready"]
    print(f"{sizes[-1]:,} categories usable after {big[0]:.2f} s ({big[1]}); target under 3 s on a quiet machine")


if __name__ == "__main__":
    main()
