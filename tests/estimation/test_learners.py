"""The default library's forests cap the rows each tree sees (issue 12, cost chosen on purpose):
below the cap they are exactly scikit-learn's plain forests, so every study at n <= 10,000 is
unchanged; above it, each tree is grown on ``rows_per_tree`` rows."""

import numpy as np
from sklearn.ensemble import RandomForestClassifier, RandomForestRegressor

from stackdr.estimation import make_learner


def _data(n, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, 4))
    return X, (X[:, 0] + rng.standard_normal(n) > 0).astype(float), X @ [1, -1, 0.5, 0]


def test_below_the_cap_the_forests_are_the_plain_forests():
    X, a, y = _data(600)
    capped_c = make_learner("forest-classifier").fit(X, a)
    plain_c = RandomForestClassifier(
        n_estimators=100, min_samples_leaf=5, max_features="sqrt", random_state=0
    ).fit(X, a)
    np.testing.assert_array_equal(capped_c.predict_proba(X), plain_c.predict_proba(X))
    capped_r = make_learner("forest-regressor").fit(X, y)
    plain_r = RandomForestRegressor(
        n_estimators=100, min_samples_leaf=5, max_features=1.0, random_state=0
    ).fit(X, y)
    np.testing.assert_array_equal(capped_r.predict(X), plain_r.predict(X))


def test_above_the_cap_each_tree_sees_rows_per_tree_rows():
    X, _, y = _data(3000)
    forest = make_learner("forest-regressor").set_params(rows_per_tree=500, n_estimators=5)
    forest.fit(X, y)
    assert forest.max_samples == 500 / 3000
    # scikit-learn's bootstrap draw: round(fraction x rows) row indices per tree, so a root
    # node holds at most 500 distinct rows.
    assert all(tree.tree_.n_node_samples[0] <= 500 for tree in forest.estimators_)
    # Below the cap again, the same object fits the plain forest (no fraction left over).
    forest.fit(X[:400], y[:400])
    assert forest.max_samples is None
