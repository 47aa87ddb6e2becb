"""Shared fixtures: models and data more than one test module reads."""

import pytest


@pytest.fixture(scope="session")
def planted_diabetes(tmp_path_factory):
    """scikit-learn's diabetes data (Efron, Hastie, Johnstone and Tibshirani 2004, ``load_diabetes``) with two
    planted pairs, target = progression + 25 z(bmi) z(bp) + 12 z(age) z(s6) (z standardised), and an
    ``XGBRegressor(n_estimators=200, max_depth=4, learning_rate=0.05)`` saved as JSON: (model path, data frame,
    csv path)."""
    xgb = pytest.importorskip("xgboost")
    from sklearn.datasets import load_diabetes

    folder = tmp_path_factory.mktemp("planted")
    bunch = load_diabetes(as_frame=True, scaled=False)
    X = bunch.data

    def z(column):
        return (X[column] - X[column].mean()) / X[column].std()

    target = bunch.target + 25 * z("bmi") * z("bp") + 12 * z("age") * z("s6")
    model = xgb.XGBRegressor(n_estimators=200, max_depth=4, learning_rate=0.05, n_jobs=1, random_state=0)
    path = folder / "model.json"
    model.fit(X, target).save_model(path)
    data = X.assign(target=target)
    data.to_csv(folder / "planted.csv", index=False)
    return path, data, folder / "planted.csv"


@pytest.fixture
def xgboost_threads(monkeypatch):
    """The ``nthread`` of every ``xgboost.train`` call made during the test, in call order (XGBoost's own entry point)."""
    xgb = pytest.importorskip("xgboost")
    seen = []
    real = xgb.train

    def spy(params, *args, **kwargs):
        seen.append(params["nthread"])
        return real(params, *args, **kwargs)

    monkeypatch.setattr(xgb, "train", spy)
    return seen
