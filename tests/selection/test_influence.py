"""bigprune/selection/influence.py: self-influence against leave-one-out retraining (scikit-learn)
and against a dense numpy Hessian built from the softmax-regression formula."""
import copy

import numpy as np
import pytest
from scipy import stats
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression
from threadpoolctl import threadpool_limits

from bigprune.selection.influence import influence_scores


@pytest.fixture(scope="module")
def digits():
    """100 seeded rows of scikit-learn's bundled digits (UCI optdigits), scaled to [0, 1]:
    10 classes x 65 weights = 650 parameters."""
    x, y = load_digits(return_X_y=True)
    pick = np.random.default_rng(0).choice(len(y), 100, replace=False)
    return (x[pick] / 16).astype(np.float32), y[pick]


def test_self_influence_ranks_like_leave_one_out_retraining(digits):
    # reference: Koh & Liang (2017): removing node i raises its own loss by about
    # g_i^T H^-1 g_i (a positive number: removal = up-weighting by -1/n, and I_up,loss(z, z) =
    # -g^T H^-1 g). The actual rise is measured by refitting scikit-learn's LogisticRegression
    # (C = 1 / l2, the same objective) without node i, warm-started from the full fit.
    x, y = digits
    scores, info = influence_scores(x, y, l2=1.0)
    assert info["method"] == "exact (Cholesky)" and info["parameters"] == 650
    data = x.astype(np.float64)
    with threadpool_limits(1):  # on shared cores BLAS threads slow the 100 small fits 20-fold
        full = LogisticRegression(C=1.0, tol=1e-10, max_iter=10000).fit(data, y)

        def own_loss(model, i):
            return -np.log(model.predict_proba(data[i:i + 1])[0, y[i]])

        rise = []
        for i in range(len(y)):
            model = copy.deepcopy(full).set_params(warm_start=True, tol=1e-7)
            model.fit(np.delete(data, i, 0), np.delete(y, i))
            rise.append(own_loss(model, i) - own_loss(full, i))
    rise = np.array(rise)
    assert (rise > 0).all() and (scores > 0).all()  # the sign: leaving a node out raises its loss
    assert stats.spearmanr(scores, rise).statistic >= 0.9
    assert np.median(scores / rise) == pytest.approx(1.0, abs=0.5)  # the scale is the loss's


def reference_self_influence(x, y, l2):
    """g_i^T H^+ g_i with H built entry by entry in numpy from the softmax Hessian
    sum_i kron(x~ x~^T, diag(p) - p p^T) (Bishop, 2006, eq. 4.110) plus l2 on the weights, at
    scikit-learn's converged weights; the pseudo-inverse handles softmax's null directions."""
    model = LogisticRegression(C=1 / l2, tol=1e-12, max_iter=100000).fit(x, y)
    p = model.predict_proba(x)
    xa = np.hstack([x, np.ones((len(x), 1))])
    onehot = np.eye(p.shape[1])[np.searchsorted(model.classes_, y)]
    hessian = sum(np.kron(np.outer(xa[i], xa[i]), np.diag(p[i]) - np.outer(p[i], p[i]))
                  for i in range(len(x)))
    penalty = np.kron(np.diag([1.0] * x.shape[1] + [0.0]), np.eye(p.shape[1]))
    inverse = np.linalg.pinv(hessian + l2 * penalty, rcond=1e-10, hermitian=True)
    grads = [np.kron(xa[i], p[i] - onehot[i]) for i in range(len(x))]
    return np.array([g @ inverse @ g for g in grads])


@pytest.mark.parametrize("rows,classes,exact", [(30, 4, True), (30, 4, False), (100, 10, True),
                                                (100, 10, False)])
def test_exact_reduced_and_conjugate_gradient_paths_agree_with_numpy(digits, rows, classes, exact):
    # reference: reference_self_influence above (dense numpy Hessian, pseudo-inverse). Fewer
    # rows than the 64 features take the Gram reduction (n < d); a budget that holds the Gram
    # matrix but not the Hessian forces conjugate gradients.
    x, y = digits[0][:rows], digits[1][:rows]
    keep = y < classes
    x, y = x[keep], y[keep]
    memory = 1 << 30 if exact else 16 * len(x) * (3 * len(x) + 64)
    scores, info = influence_scores(x, y, l2=0.5, memory_bytes=memory)
    expected = reference_self_influence(x.astype(np.float64), y, 0.5)
    np.testing.assert_allclose(scores, expected, rtol=2e-4, atol=1e-7)
    assert info["method"] == ("exact (Cholesky)" if exact else "conjugate gradients")
    assert (info["features"] == "Gram reduction to the rows' span") == (len(x) < 64)
