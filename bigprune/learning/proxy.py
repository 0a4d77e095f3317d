"""The proxy model: an L2-regularized linear softmax classifier on propagated features (SGC).

Trained with L-BFGS (scipy.optimize). The loss and gradient stream the training rows in chunks,
so the training set never needs to be in memory at once when the budget says it cannot be.
"""
from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize

from ..common.errors import InputError
from ..common.memory import chunk_ranges


@dataclass
class ProxyModel:
    """Weights ``coef`` (d x c), ``intercept`` (c,), the class labels ``classes`` (c,) and the
    feature standardization (``mean``, ``scale``, both (d,)) learnt from the training rows."""

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


def fit_proxy(features, labels, rows, l2=1.0, max_iter=300, chunk_rows=65536, tol=1e-6, init=None):
    """Fit the proxy on ``features[rows]`` with labels ``labels[rows]``.

    Parameters
    ----------
    features : array (n, d), float32; may be a memory map (read in chunks of ``chunk_rows``).
    labels : int array (n,).
    rows : int array (m,), the training rows.
    l2 : float
        Inverse of scikit-learn's ``C``: the objective is ``sum of cross-entropies +
        l2 / 2 * ||coef||^2`` (the intercept is not penalised), as ``LogisticRegression(C=1/l2)``.
    """
    rows = np.sort(np.asarray(rows, dtype=np.int64))
    if rows.size == 0:
        raise InputError("the proxy model needs at least one training node")
    y_all = np.asarray(labels)[rows]
    classes, y = np.unique(y_all, return_inverse=True)
    dim, k = features.shape[1], len(classes)
    chunks = chunk_ranges(len(rows), chunk_rows)
    mean, scale = _moments(features, rows, chunks)

    def loss_grad(theta):
        coef, intercept = theta[:dim * k].reshape(dim, k), theta[dim * k:]
        loss = 0.5 * l2 * np.sum(coef * coef)
        g_coef, g_int = l2 * coef, np.zeros(k)
        for start, stop in chunks:
            x = (np.asarray(features[rows[start:stop]], dtype=np.float64) - mean) / scale
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
        result = minimize(loss_grad, start, jac=True, method="L-BFGS-B",
                          options={"maxiter": max_iter, "gtol": tol})
        coef, intercept = result.x[:dim * k].reshape(dim, k), result.x[dim * k:]
        iterations = int(result.nit)
    return ProxyModel(coef, intercept, classes, mean, scale, iterations)


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


def _softmax(z):
    z = z - z.max(axis=1, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=1, keepdims=True)
