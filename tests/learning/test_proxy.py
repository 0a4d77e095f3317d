"""The proxy model against scikit-learn's LogisticRegression on the same features."""
import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import f1_score

from bigprune.learning.proxy import fit_proxy, scores


@pytest.fixture(scope="module")
def digits():
    # scikit-learn's bundled UCI optical digits (Alpaydin & Kaynak, 1998)
    x, y = load_digits(return_X_y=True)
    order = np.random.default_rng(0).permutation(len(y))
    return x.astype(np.float32), y, order[:1200], order[1200:]


@pytest.mark.parametrize("l2", [0.1, 1.0, 10.0])
def test_matches_sklearn_logistic_regression(digits, l2):
    x, y, train, test = digits
    model = fit_proxy(x, y, train, l2=l2)
    standardized = (x - model.mean) / model.scale
    # reference: sklearn LogisticRegression, multinomial, same objective with C = 1 / l2
    ref = LogisticRegression(C=1.0 / l2, max_iter=5000, tol=1e-8).fit(standardized[train], y[train])
    ours = model.predict_proba(x, test)
    theirs = ref.predict_proba(standardized[test])
    assert np.abs(ours - theirs).max() < 2e-3
    accuracy = np.mean(model.predict(x, test) == y[test])
    assert abs(accuracy - ref.score(standardized[test], y[test])) <= 0.01


@pytest.mark.parametrize("chunk_rows", [1, 97, 100000])
def test_chunked_training_equals_whole(digits, chunk_rows):
    x, y, train, test = digits
    whole = fit_proxy(x, y, train[:300], chunk_rows=100000)
    chunked = fit_proxy(x, y, train[:300], chunk_rows=chunk_rows)
    assert np.allclose(whole.predict_proba(x, test), chunked.predict_proba(x, test, chunk_rows=7), atol=1e-6)


def test_scores_match_sklearn_metrics():
    rng = np.random.default_rng(3)
    truth, guess = rng.integers(0, 5, 400), rng.integers(0, 6, 400)
    got = scores(truth, guess)
    # reference: sklearn.metrics.f1_score(average="macro") over the true classes
    assert got["macro_f1"] == pytest.approx(f1_score(truth, guess, labels=np.unique(truth), average="macro"))
    assert got["accuracy"] == pytest.approx(np.mean(truth == guess))
    assert got["per_class"]["2"] == pytest.approx(np.mean(guess[truth == 2] == 2))
