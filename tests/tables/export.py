"""Feature tables written by pyarrow (Apache Arrow's Python library), for
tests/tables.rs: the same invented charging-site table as Parquet in each
compression pyarrow writes, and as CSV written by Python's csv module, so
the test can check that paddock reads from the Parquet files exactly what
the CSV says.

    python3 tests/tables/export.py OUT_DIR

Columns cover what batch jobs write: a dictionary-encoded string key, a
float column with nulls, 32- and 64-bit integers, a boolean, a decimal, a
timestamp with a time zone (the `updated_at` column), a date, and a large
string. `sites.list.parquet` adds a list column, which paddock refuses,
naming the column.
"""
import csv
import datetime
import decimal
import pathlib
import sys

import pyarrow as pa
import pyarrow.parquet as pq

out = pathlib.Path(sys.argv[1])
out.mkdir(parents=True, exist_ok=True)

utc = datetime.timezone.utc
rows = [
    # site, occupancy, bays, sessions, fast, tariff, updated_at, opened, operator
    ("Harbour Lot", 0.38, 12, 40_213, True, "0.31", datetime.datetime(2026, 11, 30, 1, 0, tzinfo=utc), datetime.date(2019, 4, 2), "co-op"),
    ("Market Hall", None, 6, 9_876_543_210, False, "0.29", datetime.datetime(2026, 11, 29, 23, 30, 15, 250_000, tzinfo=utc), datetime.date(2021, 9, 14), "city"),
    ("Depot North", 0.0, 24, 0, True, None, datetime.datetime(2026, 11, 1, tzinfo=utc), None, "co-op"),
    ("Library Green", 0.92, None, 77, None, "1.05", None, datetime.date(2024, 1, 31), None),
]
columns = list(zip(*rows))
table = pa.table(
    {
        "site": pa.array(columns[0]).dictionary_encode(),
        "occupancy": pa.array(columns[1], pa.float64()),
        "bays": pa.array(columns[2], pa.int32()),
        "sessions": pa.array(columns[3], pa.int64()),
        "fast": pa.array(columns[4], pa.bool_()),
        "tariff": pa.array([decimal.Decimal(t) if t else None for t in columns[5]], pa.decimal128(6, 2)),
        "updated_at": pa.array(columns[6], pa.timestamp("us", tz="UTC")),
        "opened": pa.array(columns[7], pa.date32()),
        "operator": pa.array(columns[8], pa.large_string()),
    }
)
for compression in ["snappy", "zstd", "gzip", "lz4", "none"]:
    pq.write_table(table, out / f"sites.{compression}.parquet", compression=compression, row_group_size=3)

# The same values as text: numbers as Python writes them, times as Unix
# seconds, dates as the Unix seconds of their midnight, booleans as words.
def text(column, value):
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, datetime.datetime):
        return repr(value.timestamp())
    if isinstance(value, datetime.date):
        return str((value - datetime.date(1970, 1, 1)).days * 86400)
    return str(value)

names = table.column_names
with open(out / "sites.csv", "w", newline="") as f:
    w = csv.writer(f)
    w.writerow(names)
    for r in rows:
        w.writerow([text(n, v) for n, v in zip(names, r)])

pq.write_table(table.append_column("history", pa.array([[1, 2], [], None, [3]], pa.list_(pa.int64()))), out / "sites.list.parquet")
print(f"wrote {len(rows)} rows as Parquet ({len(names)} columns) and CSV into {out}")
