"""Power-law learning curves: ``error ≈ a · n^(-alpha)`` fitted in log-log space."""
import numpy as np


def fit_power_law(n, error, bootstrap=1000, seed=0, level=0.95):
    """Least-squares fit of ``log(error) = log(a) - alpha * log(n)``.

    Parameters
    ----------
    n : array (m,), training-set sizes (> 0).
    error : array (m,), error rates at those sizes; points with error <= 0 cannot be fitted in
        log space and are left out (counted in ``dropped``).
    bootstrap : int
        Resamples of the points (with replacement) for the interval of ``alpha``.

    Returns
    -------
    dict with ``alpha``, ``a``, ``r2``, ``alpha_low``, ``alpha_high``, ``points``, ``dropped``;
    NaN where fewer than two distinct sizes remain, and then ``reason`` says so (JSON outputs
    write NaN as null).
    """
    n = np.asarray(n, dtype=np.float64)
    error = np.asarray(error, dtype=np.float64)
    keep = (n > 0) & (error > 0) & np.isfinite(error)
    x, y = np.log(n[keep]), np.log(error[keep])
    result = {"points": int(keep.sum()), "dropped": int((~keep).sum())}
    if np.unique(x).size < 2:
        return {**result, **dict.fromkeys(("alpha", "a", "r2", "alpha_low", "alpha_high"), float("nan")),
                "reason": "fewer than two distinct training-set sizes with an error above 0"}
    slope, intercept, r2 = _line(x, y)
    rng = np.random.default_rng(seed)
    slopes = []
    for _ in range(bootstrap):
        pick = rng.integers(0, x.size, x.size)
        if np.unique(x[pick]).size >= 2:
            slopes.append(_line(x[pick], y[pick])[0])
    tail = (1 - level) / 2
    low, high = (np.quantile(-np.asarray(slopes), [tail, 1 - tail]) if slopes else (np.nan, np.nan))
    return {**result, "alpha": float(-slope), "a": float(np.exp(intercept)), "r2": float(r2),
            "alpha_low": float(low), "alpha_high": float(high)}


def _line(x, y):
    xm, ym = x.mean(), y.mean()
    sxx = np.sum((x - xm) ** 2)
    slope = np.sum((x - xm) * (y - ym)) / sxx
    intercept = ym - slope * xm
    residual = np.sum((y - intercept - slope * x) ** 2)
    total = np.sum((y - ym) ** 2)
    return slope, intercept, (1 - residual / total) if total > 0 else 1.0


def smallest_sufficient(budgets, accuracies, full_accuracy, tolerance=0.01):
    """The smallest budget whose mean accuracy is within ``tolerance`` of ``full_accuracy``.

    ``budgets`` (m,) and ``accuracies`` (m, repeats) or (m,); returns None when none reaches it.
    """
    means = np.asarray(accuracies, dtype=np.float64)
    if means.ndim > 1:
        means = means.mean(axis=1)
    for i in np.argsort(budgets):
        if means[i] >= full_accuracy - tolerance:
            return budgets[i]
    return None
