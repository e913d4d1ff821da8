#!/usr/bin/env python3
"""Writes the Parquet and Arrow IPC files tests/columnar.rs takes in, with pyarrow (PyPI, pinned
in requirements.txt), and prints a manifest of what every cell must become and what type each
column has, computed here from the Python values pyarrow writes.

  till.parquet        Snappy (pyarrow's default codec), row groups of 3 rows
  till_zstd.parquet   Zstandard
  till_gzip.parquet   gzip
  till_lz4.parquet    LZ4 (the LZ4_RAW codec)
  till.arrow          the Arrow IPC file format (Feather version 2) with LZ4 frames, the
                      default of pyarrow.feather.write_feather
  till.arrows         the Arrow IPC stream format, uncompressed
  nested.parquet      a list column, which a table cell cannot hold

Expected texts: Python's str() of integers; str() of decimal.Decimal, which keeps the scale
('12.50'); repr() of floats (the shortest round-trip text) without exponent or trailing zeros; 'true'/'false'; isoformat() of dates;
isoformat() with timespec of the column's unit for times and timestamps, an instant in UTC
ending in 'Z' when the column has a zone; the dictionary's values; '' for a null.

Usage: make_columnar.py OUTDIR  (prints the manifest as JSON)
"""
import datetime
import decimal
import json
import os
import sys

import pyarrow as pa
import pyarrow.feather as feather
import pyarrow.ipc as ipc
import pyarrow.parquet as pq

UTC = datetime.timezone.utc
OSLO_SUMMER = datetime.timezone(datetime.timedelta(hours=2))

SHOPS = ["Quillby Cycle Mend", "Ferrow Spokes", "Annick Bike Hub"]


def table():
    n = 7
    d = decimal.Decimal
    cols = {
        "till_id": pa.array([100 + i for i in range(n)], pa.int64()),
        "shop": pa.array([SHOPS[i % 3] for i in range(n)], pa.string()).dictionary_encode(),
        "note": pa.array(["tube", None, "brake pads, rear", "", "chain \"KMC\"", "Åsa's order", "lamp"]),
        "amount": pa.array([d("12.50"), d("-3.05"), d("0.00"), None, d("1204.50"), d("99999999.99"), d("7.10")],
                           pa.decimal128(10, 2)),
        "weight_kg": pa.array([2.5, 0.1, -3.75, None, 1.0, 1234.5, 0.3], pa.float64()),
        "paid": pa.array([True, False, None, True, True, False, True]),
        "day": pa.array([datetime.date(2026, 7, 1) + datetime.timedelta(days=i * 40) for i in range(n)],
                        pa.date32()),
        "rung_up": pa.array([datetime.datetime(2026, 7, 3, 9, 15, 30, 250000, tzinfo=OSLO_SUMMER)
                             + datetime.timedelta(hours=i * 13, microseconds=i) for i in range(n)],
                            pa.timestamp("us", tz="Europe/Oslo")),
        "logged": pa.array([datetime.datetime(1969, 12, 31, 23, 59, 59, 999000)
                            + datetime.timedelta(days=i * 9000, milliseconds=i) for i in range(n)],
                           pa.timestamp("ms")),
        "opens": pa.array([datetime.time(8, 30), datetime.time(9, 0, 0, 500), None,
                           datetime.time(23, 59, 59, 999999), datetime.time(0, 0), datetime.time(12, 1, 2),
                           datetime.time(7, 45)], pa.time64("us")),
        "serial": pa.array([2**64 - 1, 0, 1, 2**63, 5, 6, 7], pa.uint64()),
    }
    return pa.table(cols)


def text(value, typ):
    if value is None:
        return ""
    if pa.types.is_boolean(typ):
        return "true" if value else "false"
    if pa.types.is_floating(typ):
        # The shortest round-trip text (repr), written without exponent or trailing zeros.
        t = format(decimal.Decimal(repr(value)), "f")
        if "." in t:
            t = t.rstrip("0").rstrip(".")
        return t
    if pa.types.is_timestamp(typ):
        spec = {"s": "seconds", "ms": "milliseconds", "us": "microseconds", "ns": "nanoseconds"}[typ.unit]
        if typ.tz is not None:
            return value.astimezone(UTC).replace(tzinfo=None).isoformat(timespec=spec) + "Z"
        return value.isoformat(timespec=spec)
    if pa.types.is_time(typ):
        spec = {"s": "seconds", "ms": "milliseconds", "us": "microseconds", "ns": "nanoseconds"}[typ.unit]
        return value.isoformat(timespec=spec)
    if isinstance(value, (datetime.date,)):
        return value.isoformat()
    return str(value)


def manifest_of(t):
    rows = []
    for r in t.to_pylist():
        rows.append([text(r[f.name], f.type.value_type if pa.types.is_dictionary(f.type) else f.type)
                     for f in t.schema])
    types = []
    for f in t.schema:
        typ = f.type.value_type if pa.types.is_dictionary(f.type) else f.type
        types.append({
            "name": f.name,
            "dictionary": pa.types.is_dictionary(f.type),
            "scale": typ.scale if pa.types.is_decimal(typ) else None,
            "unit": {"s": "second", "ms": "millisecond", "us": "microsecond", "ns": "nanosecond"}[typ.unit]
            if (pa.types.is_timestamp(typ) or pa.types.is_time(typ)) else None,
            "zone": typ.tz if pa.types.is_timestamp(typ) else None,
        })
    return {"header": t.column_names, "rows": rows, "types": types}


def main():
    out = sys.argv[1]
    t = table()
    files = {}
    for name, codec in [("till.parquet", "snappy"), ("till_zstd.parquet", "zstd"),
                        ("till_gzip.parquet", "gzip"), ("till_lz4.parquet", "lz4")]:
        path = os.path.join(out, name)
        pq.write_table(t, path, compression=codec, row_group_size=3)
        files[name] = {"codec": codec.upper(), "row_groups": pq.ParquetFile(path).metadata.num_row_groups}
    feather.write_feather(t, os.path.join(out, "till.arrow"))
    files["till.arrow"] = {"codec": "LZ4_FRAME"}
    with ipc.new_stream(os.path.join(out, "till.arrows"), t.schema) as w:
        for batch in t.to_batches(max_chunksize=4):
            w.write_batch(batch)
    files["till.arrows"] = {"codec": None}
    nested = pa.table({"till_id": pa.array([1, 2]),
                       "parts": pa.array([["tube", "valve"], []], pa.list_(pa.string()))})
    pq.write_table(nested, os.path.join(out, "nested.parquet"))
    json.dump({"table": manifest_of(t), "files": files}, sys.stdout)


if __name__ == "__main__":
    main()
