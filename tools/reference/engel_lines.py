"""Reference values for the line fits on the Engel data (crates/consensor-core/tests/reference_data.rs).

Needs scipy and statsmodels from PyPI. Prints the values the Rust test compares against.
"""
import numpy as np
import scipy
import statsmodels
import statsmodels.api as sm
from scipy.optimize import linprog
from scipy.stats import theilslopes

engel = sm.datasets.engel.load_pandas().data
x = engel["income"].to_numpy()
y = engel["foodexp"].to_numpy()
print("scipy", scipy.__version__, "statsmodels", statsmodels.__version__, "numpy", np.__version__)

ts = theilslopes(y, x, alpha=0.95)
print("theilslopes slope=%r intercept=%r low=%r high=%r" % (ts.slope, ts.intercept, ts.low_slope, ts.high_slope))

qr = sm.QuantReg(y, sm.add_constant(x)).fit(q=0.5)
print("QuantReg(q=0.5) intercept=%r slope=%r sum_abs=%r" % (qr.params[0], qr.params[1], np.abs(y - qr.params[0] - qr.params[1] * x).sum()))

# Exact LAD as a linear programme: minimise sum(u+v) subject to a + b x_i + u_i - v_i = y_i.
n = len(x)
c = np.concatenate([[0, 0], np.ones(2 * n)])
a_eq = np.hstack([np.ones((n, 1)), x[:, None], np.eye(n), -np.eye(n)])
bounds = [(None, None), (None, None)] + [(0, None)] * (2 * n)
lp = linprog(c, A_eq=a_eq, b_eq=y, bounds=bounds, method="highs")
print("linprog(highs) intercept=%r slope=%r sum_abs=%r" % (lp.x[0], lp.x[1], lp.fun))
