"""Reference values for crates/consensor-server/tests/worker.rs: the Points of one interval as the
worker should publish them, computed from the same small series with numpy/scipy/statsmodels.

Station values are the medians of each station's kept readings (API.md step 4); see the test for the
series. Needs numpy, scipy, statsmodels.
"""
import numpy as np
from scipy.stats import binom, median_abs_deviation
from statsmodels.robust.norms import HuberT

B = 1.482602218505602


def point(values):
    x = np.sort(np.asarray(values, float))
    n = len(x)
    med = np.median(x)
    mad = median_abs_deviation(x)
    spread = B * mad
    mu = med
    if spread > 0:
        for _ in range(1000):
            w = HuberT(t=1.345).weights((x - mu) / spread)
            new = np.sum(w * x) / np.sum(w)
            done = abs(new - mu) <= 1e-12 * spread
            mu = new
            if done:
                break
    rs = [r for r in range(1, (n + 1) // 2 + 1) if 1 - 2 * binom.cdf(r - 1, n, 0.5) >= 0.95]
    ci = (x[rs[-1] - 1], x[n - rs[-1]]) if rs else None
    print(f"  n={n} median={med!r} low={x[(n-1)//2]!r} high={x[n//2]!r} mean={np.mean(x)!r}")
    print(f"  mad={mad!r} spread={spread!r} huber={mu!r} ci95={ci}")


wiggle = lambda m: 0.1 * (m % 3)
interval = range(0, 10)
s1_minutes = [m for m in interval if m not in (2, 5)]
print("station values:")
values = {
    "W-0": np.median([15.0 + wiggle(m) for m in interval]),
    "W-1": np.median([15.2 + wiggle(m) for m in s1_minutes]),
    "W-3": np.median([19.4 + wiggle(m) for m in interval]),
    "W-4": np.median([15.1 + wiggle(m) for m in interval]),
    "W-5": np.median([14.9 + wiggle(m) for m in interval]),
}
print(" ", {k: repr(v) for k, v in values.items()})
cross = np.array(list(values.values()))
med = np.median(cross)
scale = max(B * median_abs_deviation(cross), 0.5)
print("cross-station: median", repr(med), "scale", repr(scale), "scores", [repr((v - med) / scale) for v in cross])
print("revision 1 (W-3 set aside):")
point([values[k] for k in ("W-0", "W-1", "W-4", "W-5")])
print("revision 2 (late W-6 reading 15.6 at minute 5):")
point([values[k] for k in ("W-0", "W-1", "W-4", "W-5")] + [15.6])
print("revision 3 (W-3's set-aside overturned, its value used):")
point(list(values.values()) + [15.6])
print("mean_all, revision 1 (all numeric readings, unchecked; W-1 includes its -999s, W-2 is 17.3):")
w1_all = np.median([15.2 + wiggle(m) if m not in (2, 5) else -999.0 for m in interval])
print(" ", repr(w1_all), repr(np.mean([values["W-0"], w1_all, 17.3, values["W-3"], values["W-4"], values["W-5"]])))
