"""The pandas equivalent of a full recompute, end to end: readings read from a SQLite file, screened,
reduced to one value per area and 10-minute interval, and the results written back to the file.

`pandas_groupby.py` times only the group-by on data already in memory, which is the counterpart of
the worker benchmark's "in memory (core only)" line. A full recompute by the worker also reads the
readings from the database and stores every result, so this script does the same with pandas, the
way an analyst replacing the service with a script would:

1. read: `pandas.read_sql_query` of the readings, in station and time order (one table of area,
   station, time, value, value as sent; the data is generated and written untimed first);
2. checks, vectorised: missing-data codes (compared with the value as sent), plausible range
   (-80..60 degC), flat line (time-based rolling 60-minute max - min < 0.1 degC over at least six
   readings, not at an end of the range), and the step test against the previous reading that
   passed the other checks, with the limit interpolated in log-log between 3 degC for one minute and
   4 degC for an hour (the limits of consensor-core's `air_temperature`). Vectorised, the step test
   compares with the previous passing reading rather than the previous *accepted* one, and there
   is no provisional consensus that clears a step: less work than the worker does;
3. group-by: each station's median of its kept readings per interval, then per area and interval
   the median, mean, raw MAD, the modified z-score flag (|x - median| / max(1.4826 MAD, 0.5) > 3.5)
   and the median and mean of the stations kept, plus the unchecked mean of the stations' medians;
4. write: the interval results, the station values and the set-aside readings, appended to tables
   of the same file in one transaction with `DataFrame.to_sql`.

Not done here, though the worker does it: the confidence interval of the median, the Huber
estimate, the median's low and high ends, reasons as sentences, revisions.

    python3 tools/bench/pandas_pipeline.py [areas] [stations_per_area] [minutes] [file]
"""
import os
import sqlite3
import sys
import tempfile
import time

import numpy as np
import pandas as pd

args = sys.argv[1:]
areas, stations, minutes = (int(a) for a in (args[0:3] if len(args) >= 3 else (40, 50, 5040)))
path = args[3] if len(args) >= 4 else os.path.join(tempfile.mkdtemp(prefix="consensor-pandas-"), "readings.db")

MISSING_CODES = [-999.0, -9999.0, -7999.0, 9999.0]
RANGE = (-80.0, 60.0)
FLAT_MIN_VARIATION, FLAT_MIN_READINGS = 0.1, 6
STEP_ONE_MINUTE, STEP_ONE_HOUR = 3.0, 4.0
SCALE_FLOOR, FAR_LIMIT, MAD_TO_SD = 0.5, 3.5, 1.482602218505602
MINUTE_MS = 60_000

# The same synthetic shape as pandas_groupby.py: a diurnal cycle per area plus noise.
rng = np.random.default_rng(0xDA7A)
n = areas * stations * minutes
area = np.repeat(np.arange(areas), stations * minutes)
station = np.repeat(np.arange(areas * stations), minutes)
minute = np.tile(np.arange(minutes), areas * stations)
day = (minute % 1440) / 1440.0
value = 10.0 + area * 0.1 + 6.0 * np.sin(2 * np.pi * (day - 0.375)) + (rng.random(n) - 0.5) * 0.3
start_ms = 1_764_547_200_000  # 2025-12-01T00:00:00Z
with sqlite3.connect(path) as connection:
    connection.execute("PRAGMA journal_mode=WAL")
    connection.execute(
        "CREATE TABLE readings (area INTEGER, station INTEGER, observed_at_ms INTEGER, value REAL, value_as_sent REAL)"
    )
    connection.executemany(
        "INSERT INTO readings VALUES (?, ?, ?, ?, ?)",
        zip(area.tolist(), station.tolist(), (start_ms + minute * MINUTE_MS).tolist(), value.tolist(), value.tolist()),
    )
    connection.execute("CREATE INDEX readings_by_station ON readings (station, observed_at_ms)")
del area, station, minute, day, value
print(f"pandas {pd.__version__}, numpy {np.__version__}: {n} readings, {areas * (minutes // 10)} intervals, file {path}")

phases = {}
began = time.perf_counter()
connection = sqlite3.connect(path)
frame = pd.read_sql_query(
    "SELECT area, station, observed_at_ms, value, value_as_sent FROM readings ORDER BY station, observed_at_ms",
    connection,
)
phases["read"] = time.perf_counter() - began

mark = time.perf_counter()
rule = pd.Series(pd.NA, index=frame.index, dtype="string")
rule[frame["value"].isna()] = "missing_value"
rule[rule.isna() & frame["value_as_sent"].isin(MISSING_CODES)] = "missing_code"
out_of_range = (frame["value"] < RANGE[0]) | (frame["value"] > RANGE[1])
rule[rule.isna() & out_of_range] = "out_of_range"
frame["time"] = pd.to_datetime(frame["observed_at_ms"], unit="ms")
candidates = frame[rule.isna()]
window = candidates.groupby("station").rolling("60min", on="time")["value"]
high, low, count = window.max(), window.min(), window.count()
variation = (high - low).to_numpy()
flat = (
    (count.to_numpy() >= FLAT_MIN_READINGS)
    & (variation < FLAT_MIN_VARIATION - 1e-9)
    & ~(high.to_numpy() <= RANGE[0] + FLAT_MIN_VARIATION)
    & ~(low.to_numpy() >= RANGE[1] - FLAT_MIN_VARIATION)
)
# groupby().rolling() returns rows grouped by station; the frame is in station order already.
rule[candidates.index[flat]] = "flat_line"
passing = frame[rule.isna()]
gap = passing.groupby("station")["observed_at_ms"].diff()
change = passing.groupby("station")["value"].diff().abs()
fraction = np.log(np.clip(gap / MINUTE_MS, 1.0, None)) / np.log(60.0)
limit = np.exp(np.log(STEP_ONE_MINUTE) + fraction * (np.log(STEP_ONE_HOUR) - np.log(STEP_ONE_MINUTE)))
step = (gap <= 60 * MINUTE_MS) & (change > limit)
rule[passing.index[step.to_numpy()]] = "step"
frame["rule"] = rule
frame["interval"] = (frame["observed_at_ms"] - start_ms) // (10 * MINUTE_MS)
phases["checks"] = time.perf_counter() - mark

mark = time.perf_counter()
kept_readings = frame[frame["rule"].isna()]
per_station = kept_readings.groupby(["area", "interval", "station"], sort=False)["value"].median().reset_index()
keys = [per_station["area"], per_station["interval"]]
grouped = per_station.groupby(["area", "interval"], sort=False)["value"]
median = grouped.transform("median")
absdev = (per_station["value"] - median).abs()
mad = absdev.groupby(keys, sort=False).transform("median")
scale = np.maximum(MAD_TO_SD * mad, SCALE_FLOOR)
per_station["score"] = (per_station["value"] - median) / scale
per_station["used"] = per_station["score"].abs() <= FAR_LIMIT
used = per_station[per_station["used"]]
kept = used.groupby(["area", "interval"], sort=False)["value"]
kept_absdev = (used["value"] - kept.transform("median")).abs()
unchecked = frame.groupby(["area", "interval", "station"], sort=False)["value"].median()
mean_all = unchecked.groupby(level=["area", "interval"], sort=False).mean()
result = pd.DataFrame(
    {
        "median": kept.median(),
        "mean": kept.mean(),
        "mad": kept_absdev.groupby([used["area"], used["interval"]], sort=False).median(),
        "stations_used": kept.size(),
        "mean_all": mean_all,
    }
).reset_index()
far = per_station[~per_station["used"]].merge(
    kept_readings[["area", "interval", "station", "observed_at_ms", "value"]], on=["area", "interval", "station"], suffixes=("_station", "")
)
set_aside = pd.concat(
    [
        frame.loc[frame["rule"].notna(), ["area", "interval", "station", "observed_at_ms", "value", "rule"]],
        far.assign(rule="far_from_consensus")[["area", "interval", "station", "observed_at_ms", "value", "rule"]],
    ]
)
phases["group-by"] = time.perf_counter() - mark

mark = time.perf_counter()
with connection:
    result.to_sql("interval_results", connection, if_exists="append", index=False)
    per_station.to_sql("station_values", connection, if_exists="append", index=False)
    set_aside.to_sql("set_aside", connection, if_exists="append", index=False)
phases["write"] = time.perf_counter() - mark
elapsed = time.perf_counter() - began
connection.close()
if len(args) < 4:
    os.remove(path)

detail = ", ".join(f"{name} {seconds:.2f} s" for name, seconds in phases.items())
print(
    f"pandas end to end: {len(result)} intervals in {elapsed:.2f} s = {len(result) / elapsed:.0f} intervals/s "
    f"({detail}; {len(per_station)} station values, {len(set_aside)} readings set aside: {set_aside['rule'].value_counts().to_dict()})"
)
