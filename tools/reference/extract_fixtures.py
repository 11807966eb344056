"""Extract the real data sets that the core's tests use into small fixtures, with their provenance.

Run once with `python3 tools/reference/extract_fixtures.py` (needs statsmodels from PyPI); the output is
committed so the tests need no Python.
"""
import pathlib

import statsmodels
import statsmodels.api as sm

out = pathlib.Path(__file__).resolve().parents[2] / "crates/consensor-core/tests/fixtures"
out.mkdir(parents=True, exist_ok=True)

engel = sm.datasets.engel.load_pandas().data
with open(out / "engel.csv", "w") as f:
    f.write(
        "# Engel food expenditure data (n = 235), Koenker & Bassett (1982), Econometrica 50, 43-61;\n"
        "# distributed with the R package quantreg and with statsmodels (sm.datasets.engel), where its\n"
        f"# COPYRIGHT attribute reads: {sm.datasets.engel.COPYRIGHT!r}. Extracted with statsmodels "
        f"{statsmodels.__version__} by tools/reference/extract_fixtures.py.\n"
    )
    f.write("income,foodexp\n")
    for income, food in zip(engel["income"], engel["foodexp"]):
        f.write(f"{income!r},{food!r}\n")
print("wrote", out / "engel.csv")
