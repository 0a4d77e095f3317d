"""Self-influence under the proxy, for the ``influence`` rule (Koh & Liang, 2017).

A node's self-influence is ``s_i = g_i^T H^-1 g_i``: ``g_i`` is the gradient of its own
cross-entropy at the fitted weights and ``H`` the Hessian of the regularised training loss
(:func:`bigprune.learning.proxy.fit_proxy`'s objective) there. Removing node ``i`` moves the
weights by about ``H^-1 g_i``, so ``s_i`` is the first-order *increase* of the node's own loss
when it is left out of training (Koh & Liang's ``I_up,loss(z, z) = -s_i`` is the change when it
is up-weighted). Highest first: the nodes the model leans on most to fit themselves.

Parameters are ``(W, b)`` with ``W`` (d x c) and the intercept ``b`` (c,) unpenalised. With
``x~ = [x, 1]``, ``r_i = p_i - onehot(y_i)`` and ``A_i = diag(p_i) - p_i p_i^T`` (the softmax
Hessian, e.g. Bishop, 2006, eq. 4.110): ``g_i = x~_i (x) r_i`` and
``H = sum_i (x~_i x~_i^T) (x) A_i + l2 * I`` on the ``W`` coordinates.

Two exact reductions keep ``H`` small and invertible:

- softmax weights are defined up to a constant across classes: those directions are null (or
  only held by the penalty) and every ``g_i`` is orthogonal to them, so adding the projection
  onto them leaves ``g_i^T H^-1 g_i`` as it is and makes ``H`` positive definite;
- when the pool has fewer nodes than features (n < d), every ``x_i`` lies in the rows' span:
  the features are replaced by ``z_i = S U_i`` from the Gram matrix ``X X^T = U S^2 U^T``
  (``z_i^T z_j = x_i^T x_j``, directions below ``1e-10`` of the largest dropped), which changes
  no ``s_i`` (the penalty is isotropic on ``W``; ``H`` is ``l2 * I`` off the span).

Then, with ``P = (width + 1) * c`` parameters: exact when the dense ``H`` (``8 P^2`` bytes, plus
a block of gradients) fits in half the rule's memory (Cholesky, scipy.linalg.cho_factor), else
one conjugate-gradient solve per node (scipy.sparse.linalg.cg) with Hessian-vector products
streamed over row chunks. At the default 4 GiB, exact reaches about P = 15,000 (Citeseer's pool
of 1,812 papers: 3,703 features reduced to 1,812, so P = 1,813 x 6 = 10,878, about 0.9 GiB).
"""
import numpy as np
from scipy.linalg import cho_factor, cho_solve
from scipy.sparse.linalg import LinearOperator, cg

from ..common.memory import chunk_ranges, rows_per_chunk
from ..common.runtime import progress
from ..learning.proxy import fit_proxy

# Conjugate gradients' relative residual, and its iteration cap per node.
CG_RTOL = 1e-8
CG_MAX_ITER = 1000
# Gram-matrix directions kept: eigenvalues above this share of the largest.
RANK_TOL = 1e-10


def influence_scores(rows, labels, l2=1.0, chunk_rows=65536, memory_bytes=1 << 30):
    """Self-influence ``g_i^T H^-1 g_i`` of every row (float64 (n,)) and a JSON-ready dict.

    rows : (n, d) float32, the pool's rows. labels : (n,). l2 : the proxy's penalty.
    memory_bytes : what the rule may hold; it decides exact versus conjugate gradients.
    """
    everyone = np.arange(len(rows))
    model = fit_proxy(rows, labels, everyone, l2=l2, chunk_rows=chunk_rows)
    classes = len(model.classes)
    if classes == 1:
        return np.zeros(len(rows)), {"method": "one class: every gradient is zero", "l2": l2}
    probabilities = model.predict_proba(rows, everyone, chunk_rows)
    residual = probabilities.copy()
    residual[everyone, np.searchsorted(model.classes, labels)] -= 1.0
    features, reduced = _reduced_features(rows, memory_bytes)
    size = (features.shape[1] + 1) * classes
    block = rows_per_chunk(memory_bytes // 8, 16 * size, at_least=1)  # gradients and solutions
    info = {"l2": l2, "proxy_iterations": model.iterations, "parameters": int(size),
            "features": "Gram reduction to the rows' span" if reduced else "as given"}
    if 8 * size * size + 2 * 8 * size * min(block, len(rows)) <= memory_bytes // 2:
        scores = _exact(features, probabilities, residual, l2, chunk_rows, block)
        return scores, {**info, "method": "exact (Cholesky)"}
    scores, iterations = _conjugate_gradients(features, probabilities, residual, l2, chunk_rows)
    return scores, {**info, "method": "conjugate gradients", "cg_rtol": CG_RTOL,
                    "cg_iterations_mean": float(np.mean(iterations))}


def _reduced_features(rows, memory_bytes):
    """``(features, reduced)``: ``z = S U`` from the Gram matrix when n < d and it fits."""
    n, d = rows.shape
    if n >= d or 8 * n * (3 * n + d) > memory_bytes // 2:  # Gram, eigenvectors, z; a float64 copy
        return rows, False
    x = np.asarray(rows, dtype=np.float64)
    values, vectors = np.linalg.eigh(x @ x.T)
    keep = values > RANK_TOL * max(values.max(), 0.0)
    return vectors[:, keep] * np.sqrt(values[keep]), True


def _augmented(features, start, stop):
    x = np.asarray(features[start:stop], dtype=np.float64)
    return np.hstack([x, np.ones((len(x), 1))])


def _gradients(features, residual, start, stop):
    """Per-node gradients ``x~_i (x) r_i`` (rows, (width + 1) * c), row-major like ``W~``."""
    x = _augmented(features, start, stop)
    r = residual[start:stop]
    return (x[:, :, None] * r[:, None, :]).reshape(len(x), -1)


def _exact(features, probabilities, residual, l2, chunk_rows, block):
    width, classes = features.shape[1] + 1, residual.shape[1]
    hessian = np.zeros((width, classes, width, classes))
    for start, stop in chunk_ranges(len(features), chunk_rows):
        x = _augmented(features, start, stop)
        p = probabilities[start:stop]
        for a in range(classes):
            for b in range(a, classes):
                weight = (p[:, a] * ((a == b) - p[:, b]))[:, None]
                part = (x * weight).T @ x
                hessian[:, a, :, b] += part
                if b != a:
                    hessian[:, b, :, a] += part
    hessian = hessian.reshape(width * classes, width * classes)
    _lift(hessian, l2, width, classes)
    factor = cho_factor(hessian, overwrite_a=True)
    scores = np.empty(len(features))
    with progress(total=len(features), desc="influence", unit="node") as bar:
        for start, stop in chunk_ranges(len(features), block):
            g = _gradients(features, residual, start, stop)
            scores[start:stop] = np.einsum("ij,ji->i", g, cho_solve(factor, g.T))
            bar.update(stop - start)
    return scores


def _lift(hessian, l2, width, classes):
    """Add the penalty on ``W`` and the projection onto the class-constant directions."""
    diagonal = np.einsum("ii->i", hessian)
    diagonal[:(width - 1) * classes] += l2
    for j in range(width):
        at = slice(j * classes, (j + 1) * classes)
        hessian[at, at] += 1.0 / classes


def _conjugate_gradients(features, probabilities, residual, l2, chunk_rows):
    width, classes = features.shape[1] + 1, residual.shape[1]
    size = width * classes

    def product(vector):
        v = np.asarray(vector, dtype=np.float64).reshape(width, classes)
        out = np.zeros((width, classes))
        for start, stop in chunk_ranges(len(features), chunk_rows):
            x = _augmented(features, start, stop)
            p = probabilities[start:stop]
            z = x @ v
            out += x.T @ (p * z - p * np.sum(p * z, axis=1, keepdims=True))
        out[:-1] += l2 * v[:-1]
        out += v.mean(axis=1, keepdims=True)  # the lift: Q v, Q = I (x) 11^T / c
        return out.ravel()

    operator = LinearOperator((size, size), matvec=product, dtype=np.float64)
    scores, iterations = np.empty(len(features)), []
    with progress(total=len(features), desc="influence (cg)", unit="node") as bar:
        for i in range(len(features)):
            g = _gradients(features, residual, i, i + 1)[0]
            count = [0]
            solution, _ = cg(operator, g, rtol=CG_RTOL, atol=0.0, maxiter=CG_MAX_ITER,
                             callback=lambda _: count.__setitem__(0, count[0] + 1))
            scores[i] = g @ solution
            iterations.append(count[0])
            bar.update(1)
    return scores, iterations
