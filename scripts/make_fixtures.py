"""Regenerate the small model files committed under ``fixtures/``.

Each library has one function that trains a few tiny models on invented data
and writes, next to every model file, what the library itself predicts for
some rows, so the tests can check the committed files against the version
that wrote them without that version installed.

The data is an invented parcel-delivery scenario: route length, number of
stops, fuel price, hours the driver has been on shift, van age and the
depot the route starts from (categorical).

XGBoost section
---------------
Run it once with every XGBoost major version to cover, e.g.::

    .venv/bin/python scripts/make_fixtures.py --library xgboost
    /tmp/xgb2/bin/python scripts/make_fixtures.py --library xgboost

It writes ``fixtures/xgboost/<version>/<model>.{json,ubj}`` plus

* ``<model>.inputs.csv``: the rows, categorical columns as integer codes
  (empty = missing), header = the model's feature names;
* ``<model>.margin.npy``: ``Booster.predict(output_margin=True)`` on them;
* ``<model>.totals.csv``: ``Booster.get_score`` per feature, columns
  ``feature, splits, gain, cover`` from importance types ``weight``,
  ``total_gain``, ``total_cover``.

Only numpy, pandas and the modelling library are imported, so the script runs
in a throwaway environment holding an older library version.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import pandas as pd

DEPOTS = ["harbour", "airport", "old_town", "ring_road", "north_yard"]
N_TRAIN = 400
N_CHECK = 60


def delivery_data(n_rows: int, seed: int) -> pd.DataFrame:
    """Invented delivery routes; about 10% of the numeric readings are missing."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame(
        {
            "route_km": rng.gamma(4.0, 8.0, n_rows),
            "stops": rng.integers(3, 40, n_rows).astype(float),
            "fuel_price": rng.normal(1.7, 0.15, n_rows),
            "shift_hours": rng.uniform(0.0, 10.0, n_rows),
            "van_age_years": rng.integers(0, 12, n_rows).astype(float),
            "depot": pd.Categorical(rng.choice(DEPOTS, n_rows), categories=DEPOTS),
        }
    )
    for column in ("route_km", "fuel_price", "shift_hours"):
        frame.loc[rng.random(n_rows) < 0.1, column] = np.nan
    frame.loc[rng.random(n_rows) < 0.05, "depot"] = np.nan
    return frame


def delivery_minutes(frame: pd.DataFrame, seed: int) -> np.ndarray:
    """Delivery time with a route x shift interaction and a depot effect."""
    rng = np.random.default_rng(seed)
    km = frame["route_km"].fillna(30.0).to_numpy()
    shift = frame["shift_hours"].fillna(5.0).to_numpy()
    slow_depot = frame["depot"].isin(["old_town", "harbour"]).to_numpy()
    return 1.5 * km + 2.0 * frame["stops"].to_numpy() + 0.3 * km * (shift > 7) + 15.0 * slow_depot + rng.normal(0, 5, len(frame))


def _write_xgboost_case(booster, name: str, check: pd.DataFrame, out_dir: Path) -> None:
    import xgboost as xgb

    booster.save_model(str(out_dir / f"{name}.json"))
    booster.save_model(str(out_dir / f"{name}.ubj"))
    has_categories = any(t == "c" for t in (booster.feature_types or []))
    matrix = xgb.DMatrix(check, enable_categorical=has_categories)
    np.save(out_dir / f"{name}.margin.npy", booster.predict(matrix, output_margin=True).astype(np.float64))
    codes = check.copy()
    for column in codes.columns:
        if isinstance(codes[column].dtype, pd.CategoricalDtype):
            codes[column] = codes[column].cat.codes.astype(float).where(codes[column].cat.codes >= 0)
    codes.to_csv(out_dir / f"{name}.inputs.csv", index=False, float_format="%.9g")
    scores = {kind: booster.get_score(importance_type=kind) for kind in ("weight", "total_gain", "total_cover")}
    names = booster.feature_names
    pd.DataFrame(
        {
            "feature": names,
            "splits": [scores["weight"].get(f, 0.0) for f in names],
            "gain": [scores["total_gain"].get(f, 0.0) for f in names],
            "cover": [scores["total_cover"].get(f, 0.0) for f in names],
        }
    ).to_csv(out_dir / f"{name}.totals.csv", index=False, float_format="%.17g")


def make_xgboost(root: Path) -> list[Path]:
    """Train the XGBoost fixture models with the installed xgboost; return the directory written."""
    import xgboost as xgb

    out_dir = root / "xgboost" / xgb.__version__
    out_dir.mkdir(parents=True, exist_ok=True)
    train = delivery_data(N_TRAIN, seed=11)
    check = delivery_data(N_CHECK, seed=12)
    numeric = [c for c in train.columns if c != "depot"]
    minutes = delivery_minutes(train, seed=13)
    late = (minutes > np.median(minutes)).astype(float)
    outcome = np.digitize(minutes, np.quantile(minutes, [0.5, 0.85]))  # on time / late / very late
    common = {"max_depth": 3, "eta": 0.3, "nthread": 1, "seed": 5, "tree_method": "hist"}

    def fit(params: dict, label: np.ndarray, columns: list[str], rounds: int, categorical: bool = False):
        matrix = xgb.DMatrix(train[columns], label=label, enable_categorical=categorical)
        return xgb.train({**common, **params}, matrix, num_boost_round=rounds)

    cases = {
        "regression_nan": (fit({"objective": "reg:squarederror"}, minutes, numeric, 4), numeric),
        "binary": (fit({"objective": "binary:logistic"}, late, numeric, 4), numeric),
        "multiclass": (fit({"objective": "multi:softprob", "num_class": 3}, outcome, numeric, 2), numeric),
        "categorical": (
            fit({"objective": "reg:squarederror", "max_cat_to_onehot": 1}, minutes, list(train.columns), 4, True),
            list(train.columns),
        ),
    }
    for name, (booster, columns) in cases.items():
        _write_xgboost_case(booster, name, check[columns], out_dir)
    return [out_dir]


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=Path(__file__).resolve().parent.parent / "fixtures",
                        help="fixtures root directory (default: the repository's fixtures/)")
    parser.add_argument("--library", choices=["xgboost"], action="append",
                        help="library section to run (repeatable; default: all)")
    args = parser.parse_args(argv)
    makers = {"xgboost": make_xgboost}
    for library in args.library or list(makers):
        for written in makers[library](args.out):
            print(f"{library}: wrote {written}")


if __name__ == "__main__":
    main()
