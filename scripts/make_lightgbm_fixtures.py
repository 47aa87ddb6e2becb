"""Write the committed LightGBM fixtures under ``fixtures/lightgbm/``.

Invented scenario: a parcel courier models delivery outcomes from
``parcel_weight_kg``, ``route_km``, ``depot_backlog``, ``stairs_floor`` (0 for
ground-floor drops, so zeros are common) and ``van_type`` (a categorical code
0..5). Each model is small (a few trees, a few leaves) so the files stay a few
kilobytes. For every model the script writes

* ``<name>.txt``: ``Booster.save_model`` output;
* ``<name>.expected.json``: LightGBM's ``predict(input, raw_score=True)`` on
  ``input.csv`` and ``feature_importance("split")`` / ``("gain")``, written
  with Python's shortest round-trip float repr.

``input.csv`` holds rows with NaN, zeros, values below 1e-35, negative,
fractional and unseen ``van_type`` codes. The categorical column is given to
LightGBM's predictor as its numeric code, which is also what treeprobe reads.

Run from the repository root: ``.venv/bin/python scripts/make_lightgbm_fixtures.py``.
"""

from __future__ import annotations

import json
from pathlib import Path

import lightgbm
import numpy as np
import pandas as pd

FEATURES = ["parcel_weight_kg", "route_km", "depot_backlog", "stairs_floor", "van_type"]
VAN_TYPES = ["cargo_bike", "small_van", "large_van", "electric_van", "box_truck", "scooter"]
OUT = Path(__file__).resolve().parent.parent / "fixtures" / "lightgbm"
SMALL = {"verbose": -1, "num_leaves": 5, "min_data_in_leaf": 10, "min_data_per_group": 10,
         "cat_smooth": 1.0, "seed": 7, "deterministic": True, "num_threads": 1}


def training_data(seed: int = 11, n_rows: int = 800) -> tuple[pd.DataFrame, np.ndarray]:
    """Invented courier records and a delivery-minutes target with interactions."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "parcel_weight_kg": rng.gamma(2.0, 4.0, n_rows),
        "route_km": rng.uniform(0.5, 40.0, n_rows),
        "depot_backlog": rng.integers(0, 120, n_rows).astype(float),
        "stairs_floor": np.where(rng.random(n_rows) < 0.5, 0.0, rng.integers(1, 9, n_rows)),
        "van_type": rng.integers(0, len(VAN_TYPES), n_rows).astype(float),
    })
    frame.loc[rng.random(n_rows) < 0.08, "parcel_weight_kg"] = np.nan
    frame.loc[rng.random(n_rows) < 0.05, "route_km"] = np.nan
    minutes = (
        10.0
        + 1.5 * frame["route_km"].fillna(15.0)
        + 0.08 * frame["depot_backlog"] * (frame["van_type"] % 2 == 0)
        + 12.0 * frame["van_type"].isin([1.0, 3.0, 4.0])
        + 2.0 * frame["stairs_floor"] * (frame["parcel_weight_kg"].fillna(8.0) > 10.0)
        + rng.normal(0.0, 3.0, n_rows)
    )
    return frame, minutes.to_numpy()


def input_rows(seed: int = 12, n_rows: int = 60) -> pd.DataFrame:
    """Scoring rows that exercise every missing-value and category rule."""
    frame, _ = training_data(seed, n_rows)
    frame.loc[::7, "parcel_weight_kg"] = np.nan
    frame.loc[::5, "route_km"] = 0.0
    frame.loc[::6, "stairs_floor"] = np.nan
    frame.loc[::9, "stairs_floor"] = 1e-40
    frame.loc[::4, "van_type"] = np.nan
    frame.loc[1::8, "van_type"] = -1.0
    frame.loc[2::8, "van_type"] = 9.0
    frame.loc[3::8, "van_type"] = 2.6
    frame.loc[5::10, "depot_backlog"] = -3.0
    return frame


def fit_models(frame: pd.DataFrame, minutes: np.ndarray) -> dict[str, lightgbm.Booster]:
    """The fixture models, one per loader case."""
    matrix = frame.to_numpy()
    late = (minutes > np.median(minutes)).astype(int)
    slot = np.digitize(minutes, np.quantile(minutes, [1 / 3, 2 / 3]))
    complaints = np.random.default_rng(13).poisson(np.exp((minutes - minutes.mean()) / minutes.std()))
    categorical_frame = frame.assign(van_type=pd.Categorical.from_codes(
        frame["van_type"].astype(int), categories=VAN_TYPES))

    def fit(target: np.ndarray, rounds: int, data=matrix, categorical=(4,), **params) -> lightgbm.Booster:
        dataset = lightgbm.Dataset(data, target, feature_name=FEATURES, categorical_feature=categorical if isinstance(categorical, str) else list(categorical),
                                   free_raw_data=False)
        return lightgbm.train({**SMALL, **params}, dataset, num_boost_round=rounds)

    return {
        "regression_nan": fit(minutes, 6, categorical=(), objective="regression"),
        "binary_late": fit(late, 5, categorical=(), objective="binary"),
        "multiclass_slot": fit(slot, 3, categorical=(), objective="multiclass", num_class=3),
        "categorical_pandas": fit(minutes, 5, data=categorical_frame, categorical="auto", objective="regression"),
        "categorical_index": fit(minutes, 5, objective="regression", max_cat_to_onehot=2),
        "zero_as_missing": fit(minutes, 5, categorical=(), objective="regression", zero_as_missing=True),
        "no_missing": fit(minutes, 5, categorical=(), objective="regression", use_missing=False),
        "poisson_complaints": fit(complaints, 5, objective="poisson", max_cat_to_onehot=8),
    }


def main() -> None:
    OUT.mkdir(parents=True, exist_ok=True)
    frame, minutes = training_data()
    rows = input_rows()
    rows.to_csv(OUT / "input.csv", index=False)
    scoring = pd.read_csv(OUT / "input.csv").to_numpy()
    for name, booster in fit_models(frame, minutes).items():
        booster.save_model(OUT / f"{name}.txt")
        raw = booster.predict(scoring, raw_score=True)
        expected = {
            "lightgbm_version": lightgbm.__version__,
            "raw_score": raw.tolist(),
            "split": booster.feature_importance("split").tolist(),
            "gain": booster.feature_importance("gain").tolist(),
        }
        (OUT / f"{name}.expected.json").write_text(json.dumps(expected, indent=1) + "\n")
        print(f"{name}: {booster.num_trees()} trees, {(OUT / f'{name}.txt').stat().st_size} bytes")


if __name__ == "__main__":
    main()
