"""The outside reference for sluice's cleaning steps, computed with pandas (PyPI, pinned in
requirements.txt) and Python's decimal module.

From a raw orders export (CSV with a header, every value read as text, nothing read as
missing) it computes, in this order:
  1. every value of every column with leading and trailing white space removed (str.strip);
  2. the email column in lower case (str.lower);
  3. whole rows that repeat an earlier row removed, the first kept (drop_duplicates);
  4. rows whose status is exactly "cancelled" removed ("Cancelled" and others stay);
  5. per shop, in the order the shops first appear: the number of rows, and the exact sum of
     the non-blank amounts as a decimal.Decimal (never a float), written in fixed-point
     notation; empty when the shop has no non-blank amount.

It writes the cleaned rows to ROWS_OUT and the per-shop totals (shop,count,sum_amount) to
TOTALS_OUT, both as CSV with LF line ends, and prints pandas' version on standard output so the
caller can check which pandas it compared with.

usage: python clean_pandas.py RAW_CSV ROWS_OUT TOTALS_OUT
"""

import decimal
import sys

import pandas as pd


def exact_sum(values):
    """The sum of the non-blank values, exactly, or "" when there is none."""
    total = decimal.Decimal(0)
    seen = False
    for v in values:
        if v == "":
            continue
        total += decimal.Decimal(v)
        seen = True
    # Fixed-point text: format(..., "f") never switches to exponent notation.
    return format(total, "f") if seen else ""


def main(argv):
    raw, rows_out, totals_out = argv[1], argv[2], argv[3]
    # Enough digits for any sum here, and a rounded sum raises instead of passing silently.
    ctx = decimal.getcontext()
    ctx.prec = 60
    ctx.traps[decimal.Inexact] = True
    ctx.traps[decimal.Rounded] = True

    df = pd.read_csv(raw, dtype=str, keep_default_na=False, encoding="utf-8")
    for c in df.columns:
        df[c] = df[c].str.strip()
    df["email"] = df["email"].str.lower()
    df = df.drop_duplicates(keep="first")
    df = df[df["status"] != "cancelled"]
    df.to_csv(rows_out, index=False, lineterminator="\n")

    grouped = df.groupby("shop", sort=False)["amount"]
    totals = pd.DataFrame(
        {
            "count": grouped.size(),
            "sum_amount": grouped.agg(exact_sum),
        }
    ).reset_index()
    totals.to_csv(totals_out, index=False, lineterminator="\n")
    print(pd.__version__)


if __name__ == "__main__":
    main(sys.argv)
