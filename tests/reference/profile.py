"""Reference profile of a delimited file, computed with Python's standard csv module.

Used by the integration tests as an outside check of sluice's intake profile: row count, and
per column the blank count (empty or a declared null token), the number of distinct non-blank
values, and the shortest and longest non-blank value in Unicode code points; for columns whose values are all plain numbers, the least and greatest
value compared exactly with the decimal module.

usage: python3 profile.py FILE [--delimiter C] [--null TOKEN ...]
prints one JSON object.
"""

import csv
import decimal
import json
import re
import sys

# The plain number forms sluice's profile calls integer or decimal: an optional sign, digits,
# at most one point.
NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)$")


def main(argv):
    path = argv[1]
    delimiter = ","
    nulls = set()
    i = 2
    while i < len(argv):
        if argv[i] == "--delimiter":
            delimiter = argv[i + 1]
            i += 2
        elif argv[i] == "--null":
            nulls.add(argv[i + 1])
            i += 2
        else:
            raise SystemExit(f"unknown argument {argv[i]}")
    with open(path, newline="", encoding="utf-8-sig") as f:
        rows = list(csv.reader(f, delimiter=delimiter))
    header, data = rows[0], [r for r in rows[1:] if r]
    columns = []
    for c, name in enumerate(header):
        values = [r[c] for r in data]
        present = [v for v in values if v != "" and v not in nulls]
        numeric = bool(present) and all(NUMBER.match(v) for v in present)
        columns.append(
            {
                "name": name,
                # Exact numeric extremes (Python's decimal module), as the text they were written in.
                "numeric_min": min(present, key=decimal.Decimal) if numeric else None,
                "numeric_max": max(present, key=decimal.Decimal) if numeric else None,
                "n_blank": len(values) - len(present),
                "n_distinct": len(set(present)),
                "min_len": min((len(v) for v in present), default=None),
                "max_len": max((len(v) for v in present), default=None),
            }
        )
    json.dump({"n_rows": len(data), "n_cols": len(header), "columns": columns}, sys.stdout)


if __name__ == "__main__":
    main(sys.argv)
