"""The pandas equivalent of the worker benchmark's computation, timed on data of the same shape.

Per area and 10-minute interval: each station's median, then across stations the median, mean, raw
MAD and a MAD-based outlier flag (|x - median| / max(1.4826 MAD, 0.5) > 3.5), the core of what the
worker computes (without the per-reading checks, history windows, confidence interval, Huber
estimate or set-aside records, which have no one-line group-by). Generation is not timed.

    python3 tools/bench/pandas_groupby.py [areas] [stations_per_area] [minutes]
"""
import sys
import time

import numpy as np
import pandas as pd

areas, stations, minutes = (int(a) for a in (sys.argv[1:4] if len(sys.argv) >= 4 else (40, 50, 5040)))
rng = np.random.default_rng(0xDA7A)
n = areas * stations * minutes
area = np.repeat(np.arange(areas), stations * minutes)
station = np.tile(np.repeat(np.arange(stations), minutes), areas)
minute = np.tile(np.arange(minutes), areas * stations)
day = (minute % 1440) / 1440.0
value = 10.0 + area * 0.1 + 6.0 * np.sin(2 * np.pi * (day - 0.375)) + (rng.random(n) - 0.5) * 0.3
frame = pd.DataFrame({"area": area, "station": station, "interval": minute // 10, "value": value})
print(f"pandas {pd.__version__}, numpy {np.__version__}: {n} readings, {areas * (minutes // 10)} intervals")

began = time.perf_counter()
per_station = frame.groupby(["area", "interval", "station"], sort=False)["value"].median().reset_index()
grouped = per_station.groupby(["area", "interval"], sort=False)["value"]
median = grouped.transform("median")
absdev = (per_station["value"] - median).abs()
mad = absdev.groupby([per_station["area"], per_station["interval"]], sort=False).transform("median")
scale = np.maximum(1.482602218505602 * mad, 0.5)
per_station["far"] = absdev / scale > 3.5
kept = per_station[~per_station["far"]].groupby(["area", "interval"], sort=False)["value"]
result = pd.DataFrame({"median": kept.median(), "mean": kept.mean(), "n": kept.size()})
elapsed = time.perf_counter() - began
print(f"pandas group-by: {len(result)} intervals in {elapsed:.2f} s = {len(result) / elapsed:.0f} intervals/s")
