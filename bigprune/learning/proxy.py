"""The proxy model: an L2-regularized linear softmax classifier on propagated features (SGC).

Trained with L-BFGS (scipy.optimize). The loss and gradient stream the training rows in chunks,
so the training set never needs to be in memory at once when the budget says it cannot be.

Features are used as given by default, as SGC does (Wu et al., 2019): per-feature
standardisation inflates rare words of sparse bag-of-words features (on Citeseer it took the
standard split from 0.72 to 0.45 test accuracy), so it is opt-in (``standardize=True``).
The penalty is chosen on validation rows by :func:`fit_tuned` (SGC tunes its weight decay on
the validation split too).
"""
from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize
from threadpoolctl import threadpool_limits

from ..common.errors import InputError
from ..common.memory import chunk_ranges

# Penalties fit_tuned tries (l2 = 1 / C of scikit-learn's LogisticRegression), strongest first.
L2_GRID = (100.0, 10.0, 1.0, 0.1, 0.01, 0.001)
# The penalty when there is nothing to choose on: scikit-learn's LogisticRegression default C = 1.
DEFAULT_L2 = 1.0
# L-BFGS-B's relative-decrease stop. Its default (2.2e-9) stops early on features that are not
# standardised: entropies on raw iris were 4e-4 off scikit-learn's converged model, 1.5e-6 at
# 1e-12 (96 -> 135 iterations).
FTOL = 1e-12


@dataclass
class ProxyModel:
    """Weights ``coef`` (d x c), ``intercept`` (c,), the class labels ``classes`` (c,) and the
    feature standardization (``mean``, ``scale``, both (d,)) learnt from the training rows
    (zeros and ones when the model was fitted without standardisation)."""

    coef: np.ndarray
    intercept: np.ndarray
    classes: np.ndarray
    mean: np.ndarray
    scale: np.ndarray
    iterations: int

    def decision(self, block):
        return ((np.asarray(block, dtype=np.float64) - self.mean) / self.scale) @ self.coef + self.intercept

    def predict_proba(self, features, rows, chunk_rows=65536):
        """Class probabilities (len(rows) x c) for ``features[rows]``, computed in chunks."""
        rows = np.asarray(rows, dtype=np.int64)
        out = np.empty((len(rows), len(self.classes)))
        for start, stop in chunk_ranges(len(rows), chunk_rows):
            out[start:stop] = _softmax(self.decision(features[rows[start:stop]]))
        return out

    def predict(self, features, rows, chunk_rows=65536):
        return self.classes[np.argmax(self.predict_proba(features, rows, chunk_rows), axis=1)]


def fit_proxy(features, labels, rows, l2=DEFAULT_L2, max_iter=300, chunk_rows=65536, tol=1e-6,
              init=None, *, standardize=False):
    """Fit the proxy on ``features[rows]`` with labels ``labels[rows]``.

    Parameters
    ----------
    features : array (n, d), float32; may be a memory map (read in chunks of ``chunk_rows``).
    labels : int array (n,).
    rows : int array (m,), the training rows.
    l2 : float
        Inverse of scikit-learn's ``C``: the objective is ``sum of cross-entropies +
        l2 / 2 * ||coef||^2`` (the intercept is not penalised), as ``LogisticRegression(C=1/l2)``.
    init : optional (coef, intercept) to start L-BFGS from (a warm start).
    standardize : bool, keyword only
        Scale each feature by the training rows' mean and standard deviation first (one more
        pass over the rows). Off by default: it inflates rare features of sparse inputs.
    """
    rows = np.sort(np.asarray(rows, dtype=np.int64))
    if rows.size == 0:
        raise InputError("the proxy model needs at least one training node")
    y_all = np.asarray(labels)[rows]
    classes, y = np.unique(y_all, return_inverse=True)
    dim, k = features.shape[1], len(classes)
    chunks = chunk_ranges(len(rows), chunk_rows)
    if standardize:
        mean, scale = _moments(features, rows, chunks)
    else:
        mean, scale = np.zeros(dim), np.ones(dim)

    def block(start, stop):
        x = np.asarray(features[rows[start:stop]], dtype=np.float64)
        return (x - mean) / scale if standardize else x

    # one chunk holds every training row: read it once (the budget allows one float64 chunk)
    whole = block(*chunks[0]) if len(chunks) == 1 else None

    def loss_grad(theta):
        coef, intercept = theta[:dim * k].reshape(dim, k), theta[dim * k:]
        loss = 0.5 * l2 * np.sum(coef * coef)
        g_coef, g_int = l2 * coef, np.zeros(k)
        for start, stop in chunks:
            x = whole if whole is not None else block(start, stop)
            z = x @ coef + intercept
            z -= z.max(axis=1, keepdims=True)
            logsum = np.log(np.exp(z).sum(axis=1))
            yy = y[start:stop]
            loss += np.sum(logsum - z[np.arange(stop - start), yy])
            p = np.exp(z - logsum[:, None])
            p[np.arange(stop - start), yy] -= 1.0
            g_coef += x.T @ p
            g_int += p.sum(axis=0)
        return loss, np.concatenate([g_coef.ravel(), g_int])

    if k == 1:
        coef, intercept, iterations = np.zeros((dim, 1)), np.zeros(1), 0
    else:
        start = (np.zeros(dim * k + k) if init is None
                 else np.concatenate([np.ravel(init[0]), np.ravel(init[1])]).astype(np.float64))
        if start.shape != (dim * k + k,):
            raise InputError(f"init: weights for {dim} features and {k} classes have "
                             f"{dim * k + k} values, got {start.size}")
        with _one_blas_thread():
            result = minimize(loss_grad, start, jac=True, method="L-BFGS-B",
                              options={"maxiter": max_iter, "gtol": tol, "ftol": FTOL})
        coef, intercept = result.x[:dim * k].reshape(dim, k), result.x[dim * k:]
        iterations = int(result.nit)
    return ProxyModel(coef, intercept, classes, mean, scale, iterations)


def fit_tuned(features, labels, rows, valid=None, l2=None, standardize=False, chunk_rows=65536,
              grid=L2_GRID):
    """Fit the proxy with its penalty chosen on validation rows; return ``(model, choice)``.

    Parameters
    ----------
    features, labels, rows : the training rows, as in :func:`fit_proxy`.
    valid : ``(features_v, labels_v, rows_v)``, the validation nodes (``features_v`` may be
        another array than ``features``), or None.
    l2 : a fixed penalty (one fit, no grid), or None to choose one.
    grid : the penalties to try.

    Every value of ``grid`` is fitted from the strongest penalty to the weakest, each starting
    from the previous solution, and scored by accuracy on the valid rows; the best is kept (a
    tie keeps the stronger penalty). Without valid rows, one fit at :data:`DEFAULT_L2`.
    ``choice`` is JSON-ready: ``{"l2", "chosen_by"[, "valid_accuracy": {"100": 0.68, ...}]}``.
    """
    if l2 is not None:
        model = fit_proxy(features, labels, rows, l2=l2, chunk_rows=chunk_rows, standardize=standardize)
        return model, {"l2": float(l2), "chosen_by": "given"}
    if valid is None or len(valid[2]) == 0:
        model = fit_proxy(features, labels, rows, l2=DEFAULT_L2, chunk_rows=chunk_rows,
                          standardize=standardize)
        return model, {"l2": DEFAULT_L2, "chosen_by": "default: no valid rows to choose on"}
    penalties = sorted((float(g) for g in grid), reverse=True)
    if not penalties or penalties[-1] < 0:
        raise InputError(f"l2 grid {tuple(grid)}: give at least one penalty, each >= 0")
    features_v, labels_v, rows_v = valid
    rows_v = np.asarray(rows_v, dtype=np.int64)
    truth = np.asarray(labels_v)[rows_v]
    best, best_accuracy, accuracies, init = None, -1.0, {}, None
    for penalty in penalties:
        model = fit_proxy(features, labels, rows, l2=penalty, chunk_rows=chunk_rows, init=init,
                          standardize=standardize)
        init = (model.coef, model.intercept)
        accuracy = float(np.mean(model.predict(features_v, rows_v, chunk_rows) == truth))
        accuracies[f"{penalty:g}"] = accuracy
        if accuracy > best_accuracy:  # strictly better: a tie keeps the stronger penalty
            best, best_accuracy = model, accuracy
            chosen = penalty
    return best, {"l2": chosen, "chosen_by": "valid accuracy", "valid_accuracy": accuracies}


def evaluate(model, features, labels, rows, chunk_rows=65536):
    """Accuracy, macro-F1 and per-class accuracy of ``model`` on ``features[rows]``."""
    rows = np.asarray(rows, dtype=np.int64)
    truth = np.asarray(labels)[rows]
    guess = model.predict(features, rows, chunk_rows)
    return scores(truth, guess)


def scores(truth, guess):
    """Accuracy, macro-F1 (over the classes in ``truth``) and per-class accuracy (recall)."""
    per_class, f1 = {}, []
    for c in np.unique(truth):
        actual, predicted = truth == c, guess == c
        hits = np.sum(actual & predicted)
        recall = hits / actual.sum()
        precision = hits / predicted.sum() if predicted.any() else 0.0
        f1.append(0.0 if hits == 0 else 2 * precision * recall / (precision + recall))
        per_class[str(int(c))] = float(recall)
    return {"accuracy": float(np.mean(truth == guess)), "macro_f1": float(np.mean(f1)),
            "per_class": per_class, "evaluated": int(len(truth))}


def _moments(features, rows, chunks):
    total = np.zeros(features.shape[1])
    squares = np.zeros(features.shape[1])
    for start, stop in chunks:
        x = np.asarray(features[rows[start:stop]], dtype=np.float64)
        total += x.sum(axis=0)
        squares += np.square(x).sum(axis=0)
    mean = total / len(rows)
    std = np.sqrt(np.maximum(squares / len(rows) - mean * mean, 0.0))
    return mean, np.where(std > 1e-12, std, 1.0)


def _one_blas_thread():
    """One BLAS thread while L-BFGS runs.

    numpy and scipy each load their own OpenBLAS; L-BFGS alternates between them (the loss's
    products, then scipy's update), and each pool's threads spin while the other's work. On two
    shared cores that made a Citeseer fit (120 x 3703 features) about 60x slower than with one
    thread. The products here are thin (d x classes), so one thread loses little.
    """
    return threadpool_limits(1, user_api="blas")


def _softmax(z):
    z = z - z.max(axis=1, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=1, keepdims=True)
