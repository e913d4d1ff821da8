"""The polars baseline of the `ops` benchmark (examples/bench.rs): the same cleaning as
bench_ops_pandas.py, written as one would write it in polars (eager, every column read as
text, empty values kept as empty text), and timed whole, start-up and imports included.

Steps: strip every value, lower-case email, drop whole repeated rows keeping the first (in
order), read parts_cost as a number after removing euro signs and thousands commas, drop the
rows whose status is exactly "cancelled", sum parts_cost per technician (the export has no shop
column), write the cleaned rows to CLEANED_OUT with write_csv. Standard output: one line of
JSON as bench_ops_pandas.py prints it.

With --ten, four more steps after the filter, as the ten-step plan has them: service in
upper case, "-" replaced by "/" in opened, blank notes filled with "none", labour_hours
renamed hours.

usage: python bench_ops_polars.py RAW_CSV CLEANED_OUT [--ten]
"""

import json
import sys

import polars as pl


def main(raw, cleaned_out, ten):
    df = pl.read_csv(raw, infer_schema=False, empty_string_is_null=False)
    df = df.with_columns(pl.all().str.strip_chars())
    df = df.with_columns(pl.col("email").str.to_lowercase())
    df = df.unique(keep="first", maintain_order=True)
    df = df.with_columns(
        pl.col("parts_cost").str.replace_all("[€,]", "").cast(pl.Float64)
    )
    df = df.filter(pl.col("status") != "cancelled")
    if ten:
        df = df.with_columns(
            pl.col("service").str.to_uppercase(),
            pl.col("opened").str.replace_all("-", "/", literal=True),
            pl.when(pl.col("notes") == "").then(pl.lit("none")).otherwise(pl.col("notes")).alias("notes"),
        )
        df = df.rename({"labour_hours": "hours"})
    totals = df.group_by("technician", maintain_order=True).agg(
        pl.len().alias("count"), pl.col("parts_cost").sum().alias("sum")
    )
    df.write_csv(cleaned_out)
    print(json.dumps({
        "library": "polars",
        "version": pl.__version__,
        "rows": df.height,
        "totals": [
            {"technician": r["technician"], "count": r["count"], "sum": r["sum"]}
            for r in totals.iter_rows(named=True)
        ],
    }))


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2], sys.argv[3:] == ["--ten"])
