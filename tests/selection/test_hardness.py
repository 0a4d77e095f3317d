"""bigprune/hardness.py: entropy, EL2N and AGE scores against scipy, scikit-learn and numpy."""
import numpy as np
import pytest
from scipy import stats
from sklearn.datasets import load_iris
from sklearn.linear_model import LogisticRegression

from bigprune.common.errors import InputError
from bigprune.selection.hardness import (age_scores, age_weights, ddd_penalties, ddd_scores,
                                         density_scores, el2n_scores, entropy_scores, error_norms,
                                         percentiles, predictive_entropy)


@pytest.fixture(scope="module")
def iris():
    """scikit-learn's bundled iris (Fisher, 1936), labels shifted to show that any ints work,
    and the converged scikit-learn model on the features as they are (C = 1 / l2 = 1: the proxy
    does not standardise by default, as SGC does not)."""
    x, y = load_iris(return_X_y=True)
    x, y = x.astype(np.float32), y * 3 + 5
    model = LogisticRegression(C=1.0, max_iter=10000, tol=1e-10).fit(x.astype(np.float64), y)
    return x, y, model.predict_proba(x.astype(np.float64)), model.classes_


def test_predictive_entropy_matches_scipy():
    # reference: scipy.stats.entropy (natural log) of each probability row, zeros included
    rng = np.random.default_rng(0)
    p = rng.dirichlet(np.ones(5), size=50)
    p[:5, 1:] = 0.0
    p[:5, 0] = 1.0
    np.testing.assert_allclose(predictive_entropy(p), stats.entropy(p.T), rtol=1e-12, atol=1e-15)


def test_entropy_ranking_matches_sklearn(iris):
    # reference: scipy.stats.entropy of sklearn LogisticRegression probabilities, ranked
    x, y, probabilities, _ = iris
    scores, info = entropy_scores(x, y)
    expected = stats.entropy(probabilities.T)
    np.testing.assert_allclose(scores, expected, atol=1e-4)
    np.testing.assert_array_equal(np.argsort(-scores, kind="stable"),
                                  np.argsort(-expected, kind="stable"))
    assert info["proxy_iterations"] > 0


def test_error_norms_follow_the_el2n_formula(iris):
    # reference: Paul et al. (2021), EL2N = || p(x) - onehot(y) ||_2, in plain numpy on the
    # sklearn probabilities
    _, y, probabilities, classes = iris
    onehot = (y[:, None] == classes[None, :]).astype(np.float64)
    expected = np.linalg.norm(probabilities - onehot, axis=1)
    np.testing.assert_allclose(error_norms(probabilities, classes, y), expected, rtol=1e-12)


def test_el2n_scores_reach_sklearn_when_trained_to_convergence(iris):
    # reference: the objective is strictly convex, so from any random start a converged fit is
    # sklearn's LogisticRegression(C=1); EL2N on its probabilities computed with numpy
    x, y, probabilities, classes = iris
    onehot = (y[:, None] == classes[None, :]).astype(np.float64)
    expected = np.linalg.norm(probabilities - onehot, axis=1)
    scores, info = el2n_scores(x, y, runs=3, iterations=1000, seed=4)
    np.testing.assert_allclose(scores, expected, atol=1e-4)
    assert info["runs"] == 3 and all(0 < it < 1000 for it in info["proxy_iterations"])


def sklearn_early_el2n(x, y, runs, iterations, seed, l2=1.0):
    """EL2N (Paul et al., 2021) averaged over runs of scikit-learn's LogisticRegression(C = 1 / l2,
    lbfgs) stopped after ``iterations`` steps, each warm-started from the documented random start
    (weights ~ N(0, 1 / (d mean(x^2))) drawn from numpy.random.default_rng([seed, run]), zero
    intercepts), the error norm in numpy."""
    import warnings

    from sklearn.exceptions import ConvergenceWarning

    x = np.asarray(x, dtype=np.float64)
    classes = np.unique(y)
    onehot = (y[:, None] == classes[None, :]).astype(np.float64)
    spread = 1 / np.sqrt(x.shape[1] * np.mean(np.square(np.asarray(x, dtype=np.float32), dtype=np.float64)))
    each = []
    for run in range(runs):
        rng = np.random.default_rng([seed, run])
        model = LogisticRegression(C=1 / l2, warm_start=True, max_iter=iterations, tol=1e-12)
        model.coef_ = rng.normal(scale=spread, size=(x.shape[1], len(classes))).T.copy()
        model.intercept_, model.classes_ = np.zeros(len(classes)), classes
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)  # stopped early on purpose
            model.fit(x, y)
        each.append(np.linalg.norm(model.predict_proba(x) - onehot, axis=1))
    return np.mean(each, axis=0), each


def test_el2n_early_scores_average_random_starts(iris):
    # reference: scikit-learn's model on the same rows, warm-started from the same random start
    # and stopped after the same 3 L-BFGS steps (sklearn_early_el2n above), no bigprune code
    x, y, _, _ = iris
    scores, info = el2n_scores(x, y, runs=2, iterations=3, seed=9)
    expected, each = sklearn_early_el2n(x, y, runs=2, iterations=3, seed=9)
    np.testing.assert_allclose(scores, expected, rtol=1e-8, atol=1e-10)
    assert not np.allclose(each[0], each[1], atol=1e-3)  # the starts do differ
    converged = el2n_scores(x, y, runs=1, iterations=1000)[0]
    assert np.abs(scores - converged).max() > 1e-2  # early scores are not the converged ones


def test_percentiles_match_scipy():
    # reference: scipy.stats.percentileofscore(kind="strict"), the share strictly below
    values = np.array([3.0, 1.0, 3.0, 2.0, 5.0, 1.0, 3.0])
    expected = [stats.percentileofscore(values, v, kind="strict") / 100 for v in values]
    np.testing.assert_allclose(percentiles(values), expected, rtol=1e-12)


def test_density_uses_distance_to_the_cluster_mean():
    # reference: tight, far-apart blobs, where k-means' optimum (Lloyd's fixed point) is the
    # blob means; numpy distance of each point to its blob's mean
    rng = np.random.default_rng(2)
    centres = np.array([[0.0, 0.0, 0.0], [50.0, 0.0, 0.0], [0.0, 50.0, 0.0]])
    blob = np.repeat(np.arange(3), 40)
    rows = (centres[blob] + rng.normal(scale=0.5, size=(120, 3))).astype(np.float32)
    means = np.stack([rows[blob == g].mean(0, dtype=np.float64) for g in range(3)])
    expected = 1.0 / (1.0 + np.linalg.norm(rows - means[blob], axis=1))
    np.testing.assert_allclose(density_scores(rows, 3, seed=1), expected, rtol=1e-4)


@pytest.mark.parametrize("steps", [1, 7, 40, 300])
def test_age_weights_are_the_mean_of_the_beta_schedule(steps):
    # reference: scipy.stats.beta(1, 1.005 - 0.9**t).mean() averaged over the steps (Cai et
    # al., 2017, schedule as recalled); alpha = beta split the rest
    gamma = np.mean([stats.beta(1, 1.005 - 0.9 ** t).mean() for t in range(steps)])
    alpha, beta, g = age_weights(steps)
    assert g == pytest.approx(gamma, rel=1e-12)
    assert alpha == beta == pytest.approx((1 - gamma) / 2, rel=1e-12)


def test_age_scores_mix_the_three_percentiles(iris):
    # reference, none of it from bigprune: AGE's mix (Cai, Zheng & Chang, 2017) with weights from
    # the published schedule (gamma = mean over t < 12 of scipy.stats.beta(1, 1.005 - 0.9^t).mean(),
    # alpha = beta = (1 - gamma) / 2); entropy of scikit-learn's LogisticRegression(C = 1)
    # probabilities (scipy.stats.entropy); density 1 / (1 + distance to the row's FAISS k-means
    # centre, 3 centres, 20 iterations, seed 3) in numpy; scipy percentiles (kind="strict")
    import faiss

    x, y, probabilities, _ = iris
    centrality = np.random.default_rng(5).random(len(y))
    scores, info = age_scores(x, y, centrality, steps=12, seed=3)
    gamma = np.mean([stats.beta(1, 1.005 - 0.9 ** t).mean() for t in range(12)])
    entropy = stats.entropy(probabilities.T)
    kmeans = faiss.Kmeans(4, 3, niter=20, seed=3, verbose=False, min_points_per_centroid=1)
    kmeans.train(np.ascontiguousarray(x))
    centre = kmeans.index.search(np.ascontiguousarray(x), 1)[1][:, 0]
    density = 1.0 / (1.0 + np.linalg.norm(x.astype(np.float64) - kmeans.centroids[centre], axis=1))

    def share(v):
        return np.array([stats.percentileofscore(v, e, kind="strict") / 100 for e in v])

    expected = ((1 - gamma) / 2 * share(entropy) + (1 - gamma) / 2 * share(density)
                + gamma * share(centrality))
    # the proxy's entropies agree with scikit-learn's to ~1e-4: a near-tie may swap one rank
    # (a percentile moves by 1/150), nothing more
    assert np.mean(np.abs(scores - expected) < 1e-9) > 0.9
    np.testing.assert_allclose(scores, expected, rtol=0, atol=(1 - gamma) / 2 * 2 / len(y) + 1e-12)
    assert info["weights"]["pagerank"] == pytest.approx(gamma, rel=1e-12)


def test_ddd_penalties_are_the_chosen_and_its_grid_neighbours():
    # reference: the proxy's grid (100, 10, 1, 0.1, 0.01, 0.001) read by hand
    assert ddd_penalties(1.0) == [1.0, 10.0, 0.1]
    assert ddd_penalties(100.0) == [100.0, 10.0]
    assert ddd_penalties(0.001) == [0.001, 0.01]


def test_ddd_is_the_held_out_misclassified_share_of_sklearn_proxies(iris):
    # reference: Meding et al. (2022): the share of an ensemble's models that misclassify a
    # node; here each pair's members are scikit-learn LogisticRegression(C = 1 / l2) fits on
    # the documented halves (numpy default_rng([seed, pair]).permutation), and a node is scored
    # by the members that did not train on it
    x, y, _, _ = iris
    n, pairs = len(y), 3
    scores, info = ddd_scores(x, y, members=2 * pairs, seed=7, l2=1.0)
    wrong, truth = np.zeros(n), np.zeros(n)
    for pair, penalty in zip(range(pairs), [1.0, 10.0, 0.1]):
        order = np.random.default_rng([7, pair]).permutation(n)
        for train, held in ((order[:n // 2], order[n // 2:]), (order[n // 2:], order[:n // 2])):
            model = LogisticRegression(C=1 / penalty, max_iter=10000, tol=1e-10).fit(
                x[train].astype(np.float64), y[train])
            p = model.predict_proba(x[held].astype(np.float64))
            wrong[held] += model.classes_[p.argmax(1)] != y[held]
            truth[held] += p[np.arange(len(held)), np.searchsorted(model.classes_, y[held])]
    share = np.floor(scores * pairs + 1e-9) / pairs
    assert np.mean(share == wrong / pairs) >= 0.99  # a near-tie may flip one argmax
    assert 0 < share.mean() < 0.5 and info["penalties"] == [1.0, 10.0, 0.1]
    tie_break = (scores - share) * (pairs + 1)
    np.testing.assert_allclose(tie_break[share == wrong / pairs], (1 - truth / pairs)[share == wrong / pairs],
                               atol=2e-3)
    hardest = np.argsort(-scores, kind="stable")[:10]
    assert (wrong[hardest] / pairs).min() >= np.sort(wrong / pairs)[-10]  # the hardest come first


@pytest.mark.parametrize("members", [0, 1, 3, 2.0, True])
def test_ddd_refuses_an_odd_or_missing_ensemble(iris, members):
    x, y, _, _ = iris
    with pytest.raises(InputError) as err:
        ddd_scores(x, y, members=members)
    assert str(err.value) == (f"--ensemble {members}: use an even count >= 2 (members come in "
                              f"pairs trained on complementary halves of the pool)")
