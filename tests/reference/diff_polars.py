#!/usr/bin/env python3
"""The diff by key of diff_pandas.py done with polars (PyPI, the version pinned in
requirements.txt): a full outer join on the key columns, then rows only in the first (removed),
only in the second (added), rows of both that differ in a shared column (changed) and changed
cells per shared column, printed as JSON. A baseline of the diff benchmark.

Usage: diff_polars.py FIRST.csv SECOND.csv KEY[,KEY..]
"""
import json
import sys

import polars as pl


def main():
    first, second, key = sys.argv[1], sys.argv[2], sys.argv[3].split(",")
    # Every value as text, exactly as written.
    read = dict(infer_schema=False, empty_string_is_null=False)
    a = pl.read_csv(first, **read).with_columns(pl.lit(True).alias("__in_a"))
    b = pl.read_csv(second, **read).with_columns(pl.lit(True).alias("__in_b"))
    joined = a.join(b, on=key, how="full", coalesce=True, suffix="__b")
    in_a = pl.col("__in_a").fill_null(False)
    in_b = pl.col("__in_b").fill_null(False)
    both = joined.filter(in_a & in_b)
    shared = [c for c in b.columns if c in a.columns and c not in key and not c.startswith("__")]
    diffs = [(pl.col(c) != pl.col(c + "__b")).alias(c) for c in shared]
    flags = both.select(diffs)
    per_column = {c: int(flags[c].sum()) for c in shared}
    for c in key:
        per_column[c] = 0
    changed = int(flags.select(pl.any_horizontal(pl.all())).to_series().sum()) if shared else 0
    print(json.dumps({
        "polars": pl.__version__,
        "removed": joined.filter(in_a & ~in_b).height,
        "added": joined.filter(~in_a & in_b).height,
        "changed_rows": changed,
        "changed_cells": per_column,
    }, sort_keys=True))


if __name__ == "__main__":
    main()
