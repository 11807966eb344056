"""Reference values for the interval decision tests (crates/consensor-core/tests/interval.rs).

Station values are real published data: the MASS `chem` data (statsmodels' `robust.scale.huber`
example) and the worked example of Leys et al. (2013). Each figure is computed with the library call
named beside it. Needs numpy, scipy and statsmodels from PyPI.
"""
import numpy as np
import scipy
import statsmodels
import statsmodels.api as sm
from scipy.stats import binom, median_abs_deviation
from statsmodels.robust.norms import HuberT

print("numpy", np.__version__, "scipy", scipy.__version__, "statsmodels", statsmodels.__version__)

B = 1.482602218505602


def point(x, floor):
    x = np.asarray(x, float)
    med = np.median(x)
    mad = median_abs_deviation(x)  # raw MAD, scipy default scale=1.0
    scale = max(B * mad, floor)
    scores = (x - med) / scale
    kept = x[np.abs(scores) <= 3.5]
    print("  cross-station: median", repr(med), "raw MAD", repr(mad), "scale", repr(scale))
    print("  scores", [round(s, 6) for s in scores])
    k = np.sort(kept)
    n = len(k)
    m = np.median(k)
    kmad = median_abs_deviation(k)
    spread = B * kmad
    # Largest r with 1 - 2*binom.cdf(r-1, n, 0.5) >= 0.95
    r = max([r for r in range(1, (n + 1) // 2 + 1) if 1 - 2 * binom.cdf(r - 1, n, 0.5) >= 0.95], default=None)
    ci = (k[r - 1], k[n - r]) if r else (None, None)
    # Huber with scale fixed at the spread: statsmodels RLM with HuberT(t=1.345) iterated by hand
    # (RLM re-estimates the scale; here it is held fixed, as API.md defines `huber`).
    mu = m
    norm = HuberT(t=1.345)
    for _ in range(1000):
        w = norm.weights((k - mu) / spread)
        new = np.sum(w * k) / np.sum(w)
        if abs(new - mu) <= 1e-12 * spread:
            mu = new
            break
        mu = new
    print("  kept n", n, "median", repr(m), "low", repr(k[(n - 1) // 2]), "high", repr(k[n // 2]))
    print("  mean", repr(np.mean(k)), "mad", repr(kmad), "spread", repr(spread))
    print("  ci95 r", r, ci, "huber", repr(mu))
    print("  mean_all", repr(np.mean(x)))


chem = [2.20, 2.20, 2.4, 2.4, 2.5, 2.7, 2.8, 2.9, 3.03, 3.03, 3.10, 3.37, 3.4, 3.4, 3.4, 3.5, 3.6, 3.7,
        3.7, 3.7, 3.7, 3.77, 5.28, 28.95]
print("chem as 24 air_temperature station values (min_spread 0.5):")
point(chem, 0.5)
leys = [1, 3, 3, 6, 8, 10, 10, 1000]
print("Leys et al. as 8 pm2_5 station values (min_spread 2):")
point(leys, 2.0)
