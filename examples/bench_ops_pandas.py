"""The pandas baseline of the `ops` benchmark (examples/bench.rs): the cleaning the benchmark's
plan records with sluice, written as one would write it in pandas, and timed whole (start-up
and imports included), as someone runs such a script.

From the work-order export RAW_CSV (every value read as text, nothing read as missing) it
  1. strips leading and trailing white space from every value of every column;
  2. lower-cases the email column;
  3. drops whole rows that repeat an earlier row (the first is kept);
  4. reads parts_cost as a number: euro signs and thousands commas removed, then to_numeric;
  5. drops the rows whose status is exactly "cancelled";
  6. sums parts_cost per technician (the export has no shop column; its rows are all one shop's);
and writes the cleaned rows to CLEANED_OUT with to_csv. On standard output it prints one line
of JSON for the benchmark to compare with sluice's result: pandas' version, the number of
cleaned rows, and per technician (in the order they first appear) the row count and the sum,
a float.

With --ten, four more steps after the filter, as the ten-step plan has them: service in
upper case, "-" replaced by "/" in opened, blank notes filled with "none", labour_hours
renamed hours.

usage: python bench_ops_pandas.py RAW_CSV CLEANED_OUT [--ten]
"""

import json
import sys

import pandas as pd


def main(raw, cleaned_out, ten):
    df = pd.read_csv(raw, dtype=str, keep_default_na=False)
    for column in df.columns:
        df[column] = df[column].str.strip()
    df["email"] = df["email"].str.lower()
    df = df.drop_duplicates()
    df["parts_cost"] = pd.to_numeric(
        df["parts_cost"].str.replace("€", "", regex=False).str.replace(",", "", regex=False)
    )
    df = df[df["status"] != "cancelled"]
    if ten:
        df["service"] = df["service"].str.upper()
        df["opened"] = df["opened"].str.replace("-", "/", regex=False)
        df["notes"] = df["notes"].mask(df["notes"] == "", "none")
        df = df.rename(columns={"labour_hours": "hours"})
    totals = df.groupby("technician", sort=False)["parts_cost"].agg(["size", "sum"])
    df.to_csv(cleaned_out, index=False)
    print(json.dumps({
        "library": "pandas",
        "version": pd.__version__,
        "rows": len(df),
        "totals": [
            {"technician": t, "count": int(r["size"]), "sum": float(r["sum"])}
            for t, r in totals.iterrows()
        ],
    }))


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2], sys.argv[3:] == ["--ten"])
