"""The one generator of the delivery-fleet test data: numeric, categorical and missing inputs, a cost and 3 classes."""

import numpy as np
import pandas as pd


def fleet(seed: int, n: int) -> tuple[pd.DataFrame, np.ndarray, np.ndarray]:
    """(frame, cost, classes): fuel price (15% missing), shift length, a four-level depot, load; cost with a
    fuel x shift product and a depot-specific load effect; classes = cost cut at its 40% and 75% quantiles."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "fuel_price": rng.normal(1.5, 0.3, n),
        "shift_length": rng.uniform(4, 12, n),
        "depot": pd.Categorical(rng.choice(["north", "south", "east", "west"], n)),
        "load_kg": rng.gamma(2.0, 100.0, n),
    })
    frame.loc[rng.random(n) < 0.15, "fuel_price"] = np.nan
    cost = (np.nan_to_num(frame.fuel_price, nan=1.0) * frame.shift_length
            + (frame.depot.cat.codes == 2) * frame.load_kg / 100 + rng.normal(scale=0.3, size=n))
    classes = np.digitize(cost, np.quantile(cost, [0.4, 0.75]))
    return frame, cost.to_numpy(), classes
