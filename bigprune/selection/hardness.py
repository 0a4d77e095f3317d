"""Per-node hardness scores from the proxy model, for the ``entropy``, ``el2n``, ``age`` and
``ddd`` rules (``influence`` has its own module).

Every function takes the pool's rows of the selection embedding (float32 (n, d), in memory) and
the pool's labels (int (n,)), and returns float64 scores (n,) where higher means "pick first",
plus a small JSON-ready dict describing how the scores were made (for the report).
"""
import math

import numpy as np

from ..common.errors import InputError
from ..learning.proxy import L2_GRID, fit_proxy
from ..common.runtime import progress

# EL2N (Paul et al., 2021) scores a node early in training, averaged over random starts. The
# paper scored at epoch 20 of 200 over 10 initializations (from memory); L-BFGS converges in
# far fewer steps than SGD, so "early" here is 10 iterations (a full fit takes ~50-300).
EL2N_RUNS = 5
EL2N_ITERATIONS = 10
# AGE (Cai et al., 2017), recalled from memory: at step t the centrality weight is drawn from
# Beta(1, 1.005 - base**t) and the entropy and density weights split the rest equally; base
# was 0.9 on some of the paper's data sets and 0.995 on others (not verified).
AGE_BASE = 0.9
# DDD's ensemble size (``ddd_scores(members=...)``, ``select(ensemble=...)``, ``--ensemble``):
# four pairs of proxies on complementary halves, so every node gets four held-out votes.
DDD_MEMBERS = 8


def predictive_entropy(probabilities):
    """Shannon entropy (natural log) of each row of ``probabilities`` (n, c); 0 log 0 = 0."""
    p = np.asarray(probabilities, dtype=np.float64)
    logs = np.log(np.where(p > 0, p, 1.0))
    return -(p * logs).sum(axis=1)


def error_norms(probabilities, classes, labels):
    """EL2N's per-node error: ``|| p - onehot(label) ||_2`` (Paul et al., 2021).

    probabilities : (n, c), columns in the order of ``classes`` (sorted, (c,)). labels : (n,).
    """
    p = np.array(probabilities, dtype=np.float64)
    p[np.arange(len(p)), np.searchsorted(classes, labels)] -= 1.0
    return np.sqrt((p * p).sum(axis=1))


def entropy_scores(rows, labels, l2=1.0, chunk_rows=65536):
    """Predictive entropy of the proxy fitted on all of ``rows`` (to convergence)."""
    everyone = np.arange(len(rows))
    model = fit_proxy(rows, labels, everyone, l2=l2, chunk_rows=chunk_rows)
    scores = predictive_entropy(model.predict_proba(rows, everyone, chunk_rows))
    return scores, {"proxy_iterations": model.iterations, "l2": l2}


def el2n_scores(rows, labels, runs=EL2N_RUNS, iterations=EL2N_ITERATIONS, seed=0, l2=1.0,
                chunk_rows=65536):
    """Mean EL2N error over ``runs`` proxies, each fitted on the whole pool for ``iterations``
    L-BFGS steps from its own random start (weights ~ N(0, 1 / (d * mean(x^2))), intercepts 0),
    so that early logits are of order one as in a fresh network, whatever the features' scale."""
    everyone = np.arange(len(rows))
    classes = np.unique(labels)
    width = rows.shape[1]
    total = np.zeros(len(rows))
    steps = []
    square = float(np.einsum("ij,ij->", rows, rows, dtype=np.float64)) / rows.size
    spread = 1.0 / math.sqrt(width * square) if square > 0 else 1.0 / math.sqrt(width)
    with progress(total=runs, desc="el2n", unit="run") as bar:
        for run in range(runs):
            rng = np.random.default_rng([seed, run])
            init = (rng.normal(scale=spread, size=(width, len(classes))),
                    np.zeros(len(classes)))
            model = fit_proxy(rows, labels, everyone, l2=l2, max_iter=iterations,
                              chunk_rows=chunk_rows, init=init)
            total += error_norms(model.predict_proba(rows, everyone, chunk_rows), model.classes,
                                 labels)
            steps.append(model.iterations)
            bar.update(1)
    return total / runs, {"runs": runs, "iterations": iterations, "start": "random normal, "
                          "sd 1/sqrt(d * mean(x^2))", "proxy_iterations": steps, "l2": l2}


def density_scores(rows, clusters, seed=0):
    """AGE's density ``1 / (1 + ||x - centroid(x)||)`` with FAISS k-means (``clusters`` centres)."""
    import faiss

    rows = np.ascontiguousarray(rows, dtype=np.float32)
    clusters = max(1, min(int(clusters), len(rows)))
    kmeans = faiss.Kmeans(rows.shape[1], clusters, niter=20, seed=int(seed) % (2**31),
                          verbose=False, min_points_per_centroid=1)
    kmeans.train(rows)
    squared = kmeans.index.search(rows, 1)[0][:, 0].astype(np.float64)
    return 1.0 / (1.0 + np.sqrt(np.maximum(squared, 0.0)))


def percentiles(values):
    """Share of ``values`` strictly below each value (AGE's percentile), in [0, 1)."""
    values = np.asarray(values)
    return np.searchsorted(np.sort(values), values, side="left") / len(values)


def age_weights(steps, base=AGE_BASE):
    """(alpha, beta, gamma) for entropy, density and centrality in one shot of ``steps`` picks.

    The paper draws gamma_t ~ Beta(1, 1.005 - base**t) at step t; a one-shot selection uses
    the mean weight of the schedule over the steps it replaces: the average over t < steps of
    E[gamma_t] = 1 / (2.005 - base**t). alpha = beta = (1 - gamma) / 2.
    """
    t = np.arange(max(1, int(steps)), dtype=np.float64)
    gamma = float(np.mean(1.0 / (2.005 - base ** t)))
    return (1.0 - gamma) / 2, (1.0 - gamma) / 2, gamma


def age_scores(rows, labels, centrality, steps, seed=0, l2=1.0, chunk_rows=65536):
    """AGE's mix ``alpha P(entropy) + beta P(density) + gamma P(centrality)`` of percentiles.

    centrality : float (n,), e.g. PageRank. steps : int, picks the schedule spans.
    The density clusters are as many as the classes in ``labels``.
    """
    entropy, info = entropy_scores(rows, labels, l2=l2, chunk_rows=chunk_rows)
    density = density_scores(rows, len(np.unique(labels)), seed)
    alpha, beta, gamma = age_weights(steps)
    score = (alpha * percentiles(entropy) + beta * percentiles(density)
             + gamma * percentiles(centrality))
    return score, {**info, "weights": {"entropy": alpha, "density": beta, "pagerank": gamma},
                   "schedule_base": AGE_BASE, "steps": int(steps)}


def ddd_penalties(chosen, grid=L2_GRID):
    """The ensemble's penalties: ``chosen``, then its stronger and its weaker neighbour on
    ``grid`` (those that exist); member pairs take them in turn."""
    ordered = sorted({float(g) for g in grid} | {float(chosen)}, reverse=True)
    at = ordered.index(float(chosen))
    return [ordered[i] for i in (at, at - 1, at + 1) if 0 <= i < len(ordered)]


def ddd_scores(rows, labels, members=DDD_MEMBERS, seed=0, l2=1.0, chunk_rows=65536):
    """Ensemble disagreement (Meding, Buschoff, Geirhos & Wichmann, 2022): the share of held-out
    proxies that misclassify each node, higher first.

    The ``members`` proxies (an even count) come in pairs: pair ``j`` draws the permutation
    ``numpy.random.default_rng([seed, j]).permutation(n)``, its first member trains on the first
    ``n // 2`` nodes and its second on the rest, so every node is held out of exactly one member
    per pair and is scored only by those ``members / 2`` proxies (a node a proxy trained on is
    nearly always right). Diversity comes from the halves and from the penalty: pair ``j`` uses
    ``ddd_penalties(l2)[j % 3]`` (the chosen l2, one grid step stronger, one weaker); the hops
    are not varied (one embedding is held). Members train one after another, each with the
    proxy's chunked buffers, so memory does not grow with the ensemble.

    The score is ``share + (1 - mean held-out probability of the true label) / (pairs + 1)``:
    the share ranks first (its steps are ``1 / pairs``), the margin only breaks its ties.
    """
    if isinstance(members, bool) or not isinstance(members, (int, np.integer)) or members < 2 \
            or members % 2:
        raise InputError(f"--ensemble {members}: use an even count >= 2 (members come in pairs "
                         f"trained on complementary halves of the pool)")
    n, pairs = len(rows), members // 2
    labels = np.asarray(labels)
    wrong, truth_probability = np.zeros(n), np.zeros(n)
    penalties = ddd_penalties(l2)
    steps = []
    with progress(total=members, desc="ddd", unit="proxy") as bar:
        for pair in range(pairs):
            order = np.random.default_rng([seed, pair]).permutation(n)
            for train, held in ((order[:n // 2], order[n // 2:]), (order[n // 2:], order[:n // 2])):
                held = np.sort(held)
                model = fit_proxy(rows, labels, train, l2=penalties[pair % len(penalties)],
                                  chunk_rows=chunk_rows)
                p = model.predict_proba(rows, held, chunk_rows)
                known = np.isin(labels[held], model.classes)
                column = np.searchsorted(model.classes, labels[held]).clip(max=len(model.classes) - 1)
                right = np.where(known, p[np.arange(len(held)), column], 0.0)
                wrong[held] += model.classes[np.argmax(p, axis=1)] != labels[held]
                truth_probability[held] += right
                steps.append(model.iterations)
                bar.update(1)
    share = wrong / pairs
    score = share + (1.0 - truth_probability / pairs) / (pairs + 1)
    return score, {"members": int(members), "halves": "complementary, seeded per pair",
                   "penalties": penalties, "proxy_iterations": steps, "l2": l2,
                   "misclassified_share_mean": float(share.mean())}
