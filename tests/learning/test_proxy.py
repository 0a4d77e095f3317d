"""The proxy model against scikit-learn's LogisticRegression on the same features."""
import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import f1_score
from sklearn.preprocessing import StandardScaler

import bigprune.learning.proxy as proxy
from bigprune.learning.proxy import DEFAULT_L2, L2_GRID, fit_proxy, fit_tuned, scores


@pytest.fixture(scope="module")
def digits():
    # scikit-learn's bundled UCI optical digits (Alpaydin & Kaynak, 1998), pixels scaled to
    # [0, 1] (they are 0..16); 1,200 rows to train on, 597 held out
    x, y = load_digits(return_X_y=True)
    order = np.random.default_rng(0).permutation(len(y))
    return (x / 16).astype(np.float32), y, order[:1200], order[1200:]


@pytest.mark.parametrize("l2", [0.1, 1.0, 10.0])
def test_matches_sklearn_logistic_regression(digits, l2):
    x, y, train, test = digits
    model = fit_proxy(x, y, train, l2=l2)
    # the default uses the features as given: no standardisation
    assert not model.mean.any() and np.all(model.scale == 1.0)
    # reference: sklearn LogisticRegression, multinomial, same objective with C = 1 / l2
    ref = LogisticRegression(C=1.0 / l2, max_iter=5000, tol=1e-8).fit(x[train], y[train])
    ours = model.predict_proba(x, test)
    theirs = ref.predict_proba(x[test])
    assert np.abs(ours - theirs).max() < 5e-3
    accuracy = np.mean(model.predict(x, test) == y[test])
    assert abs(accuracy - ref.score(x[test], y[test])) <= 0.01


def test_standardize_matches_standard_scaler(digits):
    x, y, train, test = digits
    model = fit_proxy(x, y, train, l2=1.0, standardize=True)
    # reference: sklearn StandardScaler (population std; constant pixels are left at scale 1)
    # then LogisticRegression(C = 1 / l2)
    scaler = StandardScaler().fit(x[train])
    assert np.allclose(model.mean, scaler.mean_, atol=1e-6)
    assert np.allclose(model.scale, scaler.scale_, atol=1e-6)
    ref = LogisticRegression(C=1.0, max_iter=5000, tol=1e-8).fit(scaler.transform(x[train]), y[train])
    assert np.abs(model.predict_proba(x, test) - ref.predict_proba(scaler.transform(x[test]))).max() < 5e-3


@pytest.mark.parametrize("chunk_rows", [1, 97, 100000])
def test_chunked_training_equals_whole(digits, chunk_rows):
    x, y, train, test = digits
    whole = fit_proxy(x, y, train[:300], chunk_rows=100000)
    chunked = fit_proxy(x, y, train[:300], chunk_rows=chunk_rows)
    # the same optimum: chunked sums round differently, so L-BFGS paths part at ~1e-6
    assert np.allclose(whole.predict_proba(x, test), chunked.predict_proba(x, test, chunk_rows=7), atol=1e-5)


def test_tuned_l2_is_the_one_sklearn_picks(digits):
    x, y, order, rest = digits
    train, valid = order[:300], np.concatenate([order[1000:], rest])
    model, choice = fit_tuned(x, y, train, valid=(x, y, valid))
    # reference: scikit-learn's LogisticRegression(C = 1 / l2) fitted on the same rows for every
    # value of the grid and scored on the same valid rows; the best, ties to the stronger penalty
    theirs = {f"{l2:g}": LogisticRegression(C=1.0 / l2, max_iter=10000, tol=1e-8)
              .fit(x[train], y[train]).score(x[valid], y[valid]) for l2 in L2_GRID}
    assert set(choice["valid_accuracy"]) == set(theirs) == {"100", "10", "1", "0.1", "0.01", "0.001"}
    for name, accuracy in theirs.items():
        assert abs(choice["valid_accuracy"][name] - accuracy) <= 0.01, name
    best = max(L2_GRID, key=lambda l2: (theirs[f"{l2:g}"], l2))
    assert choice == {**choice, "l2": best, "chosen_by": "valid accuracy"}
    # the model returned is the one fitted at the chosen value
    assert np.mean(model.predict(x, valid) == y[valid]) == choice["valid_accuracy"][f"{best:g}"]


def test_tuning_goes_from_strong_to_weak_with_warm_starts(digits, monkeypatch):
    x, y, train, test = digits
    calls = []

    def spy(*args, **kwargs):
        calls.append((kwargs["l2"], kwargs.get("init") is not None))
        return fit_proxy(*args, **kwargs)

    monkeypatch.setattr(proxy, "fit_proxy", spy)
    _, choice = fit_tuned(x, y, train[:200], valid=(x, y, test), grid=(0.01, 10.0, 1.0))
    assert calls == [(10.0, False), (1.0, True), (0.01, True)]
    assert list(choice["valid_accuracy"]) == ["10", "1", "0.01"]


def test_a_tie_keeps_the_stronger_penalty(digits):
    x, y, train, test = digits
    # one valid row that every fit classifies alike: every grid value scores the same
    easy = next(r for r in test if fit_proxy(x, y, train[:200], l2=100.0).predict(x, [r])[0] == y[r])
    _, choice = fit_tuned(x, y, train[:200], valid=(x, y, np.array([easy])), grid=(100.0, 10.0))
    assert choice["valid_accuracy"] == {"100": 1.0, "10": 1.0} and choice["l2"] == 100.0


def test_no_valid_rows_fall_back_to_the_default(digits, monkeypatch):
    x, y, train, test = digits
    for valid in (None, (x, y, np.array([], dtype=np.int64))):
        model, choice = fit_tuned(x, y, train[:200], valid=valid)
        assert choice == {"l2": DEFAULT_L2, "chosen_by": "default: no valid rows to choose on"}
        direct = fit_proxy(x, y, train[:200], l2=DEFAULT_L2)
        assert np.allclose(model.coef, direct.coef)
    assert DEFAULT_L2 == 1.0  # scikit-learn's LogisticRegression default C = 1


def test_a_given_l2_fits_once(digits, monkeypatch):
    x, y, train, test = digits
    calls = []
    monkeypatch.setattr(proxy, "fit_proxy", lambda *a, **k: calls.append(k) or fit_proxy(*a, **k))
    model, choice = fit_tuned(x, y, train[:200], valid=(x, y, test), l2=0.5, standardize=True)
    assert choice == {"l2": 0.5, "chosen_by": "given"}
    assert len(calls) == 1 and calls[0]["l2"] == 0.5 and calls[0]["standardize"] is True
    assert model.scale.min() > 0 and model.mean.any()


def test_valid_rows_may_live_in_another_array(digits):
    x, y, train, test = digits
    # the study keeps the valid rows gathered apart from the training rows
    _, here = fit_tuned(x, y, train[:200], valid=(x, y, test), grid=(10.0, 1.0))
    _, apart = fit_tuned(x, y, train[:200], valid=(x[test], y[test], np.arange(len(test))), grid=(10.0, 1.0))
    assert here == apart


def test_scores_match_sklearn_metrics():
    rng = np.random.default_rng(3)
    truth, guess = rng.integers(0, 5, 400), rng.integers(0, 6, 400)
    got = scores(truth, guess)
    # reference: sklearn.metrics.f1_score(average="macro") over the true classes
    assert got["macro_f1"] == pytest.approx(f1_score(truth, guess, labels=np.unique(truth), average="macro"))
    assert got["accuracy"] == pytest.approx(np.mean(truth == guess))
    assert got["per_class"]["2"] == pytest.approx(np.mean(guess[truth == 2] == 2))
