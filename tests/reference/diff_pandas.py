#!/usr/bin/env python3
"""The outside reference for sluice's diff by key: pandas (PyPI, the version pinned in
requirements.txt) compares two CSV files with an outer merge on the key columns and prints, as
JSON, how many rows only the first has (removed), only the second has (added), how many rows
of both differ in at least one shared column (changed) and how many cells differ per shared
column.

Usage: diff_pandas.py FIRST.csv SECOND.csv KEY[,KEY..]
"""
import json
import sys

import pandas as pd


def main():
    first, second, key = sys.argv[1], sys.argv[2], sys.argv[3].split(",")
    # Every value as text, exactly as written: no type guessing, no missing-value tokens.
    read = dict(dtype=str, keep_default_na=False, na_filter=False)
    a = pd.read_csv(first, **read)
    b = pd.read_csv(second, **read)
    merged = a.merge(b, on=key, how="outer", suffixes=("__a", "__b"), indicator=True)
    both = merged[merged["_merge"] == "both"]
    shared = [c for c in b.columns if c in a.columns and c not in key]
    per_column = {}
    any_diff = pd.Series(False, index=both.index)
    for c in shared:
        d = both[c + "__a"] != both[c + "__b"]
        per_column[c] = int(d.sum())
        any_diff |= d
    for c in key:
        per_column[c] = 0
    print(json.dumps({
        "pandas": pd.__version__,
        "removed": int((merged["_merge"] == "left_only").sum()),
        "added": int((merged["_merge"] == "right_only").sum()),
        "changed_rows": int(any_diff.sum()),
        "changed_cells": per_column,
    }, sort_keys=True))


if __name__ == "__main__":
    main()
