"""pandas and polars frames through every entry point of the package, and steps recorded from
a `with` block, checked against the libraries' own readers and computations of the same data
(pandas.read_csv, polars.read_csv, their group sums and filters) and Python's csv module for
raw lines."""
import csv
import decimal
import io
import json
import os

import pandas as pd
import polars as pl
import pytest

import sluice

RAW = (
    "ticket,shop,service,labour\n"
    "7001, Quillby Cycle Mend ,puncture,12.50\n"
    "7002,Ferrow Spokes,brake bleed,30\n"
    "7003,annick bike hub,puncture,12.50\n"
    "7002,Ferrow Spokes,brake bleed,30\n"
    "7004,\"Quillby, east\",chain,8.75\n"
)

FLEET = {"shop": ["Quillby Cycle Mend", "Ferrow Spokes", " Annick Bike Hub", "Ferrow Spokes"],
         "bikes": [3, 12, 7, 5],
         "service": ["puncture", "chain", "puncture", "brake bleed"]}


@pytest.fixture
def store(tmp_path):
    s = sluice.Store.setup(tmp_path, person="Robin Example", email="robin@example.org")
    (tmp_path / "repairs.csv").write_text(RAW, encoding="utf-8")
    s.project = tmp_path
    return s


def raw_lines():
    # Source: Python's csv module: the line each ticket's record starts on.
    reader = csv.reader(io.StringIO(RAW))
    lines = {}
    for row in reader:
        lines.setdefault(row[0], reader.line_num)
    return lines


def frame(library, data):
    return pd.DataFrame(data) if library == "pandas" else pl.DataFrame(data)


def as_text_rows(f):
    """A frame's rows as lists of text, whichever library made it ("" for a missing value)."""
    if isinstance(f, pl.DataFrame):
        return [["" if v is None else str(v) for v in row] for row in f.iter_rows()]
    return [["" if pd.isna(v) else str(v) for v in row] for row in f.itertuples(index=False)]


def line_of(marker):
    """The line of this file that holds `marker` (for the recorded calling line)."""
    with open(__file__, encoding="utf-8") as f:
        for n, text in enumerate(f, 1):
            if marker in text:
                return n
    raise AssertionError(marker)


@pytest.mark.parametrize("library", ["pandas", "polars"])
def test_a_frame_through_every_entry_point(store, library):
    # In: a frame of either library becomes a version.
    r = store.receive(frame(library, FLEET), as_="fleet", why="from a notebook")
    assert r["recorded"] and r["version"]["n_rows"] == 4

    # Out: any version reads as either library, equal to that library's own reading of the
    # version written as CSV (pandas.read_csv and polars.read_csv, every cell as text).
    store.write("fleet", store.project / "fleet.csv")
    want = as_text_rows(pd.read_csv(store.project / "fleet.csv", dtype=str,
                                    keep_default_na=False))
    assert want == as_text_rows(pl.read_csv(store.project / "fleet.csv", infer_schema=False))
    for lib in ("pandas", "polars"):
        got = store.read("fleet", library=lib, typed=False)
        if lib == "polars":
            got = got.drop("sluice_row")
        assert as_text_rows(got) == want
    # Typed reading: bikes as integers, in either library.
    assert list(store.read("fleet", library=library)["bikes"]) == [3, 12, 7, 5]

    # A step from the library's own code, in a with block, labels kept: exact.
    with store.record("fleet", why="trim shop names, no chain jobs", library=library) as step:
        df = step.input
        if library == "pandas":
            df = df[df["service"] != "chain"]
            df = df.assign(shop=df["shop"].str.strip())
        else:
            df = (df.filter(pl.col("service") != "chain")
                    .with_columns(pl.col("shop").str.strip_chars()))
        step.output = df
    assert step.result["lineage"] == "exact"
    # The library's own filter removes the same rows.
    f = frame(library, FLEET)
    kept = (f[f["service"] != "chain"] if library == "pandas"
            else f.filter(pl.col("service") != "chain"))
    assert step.result["rows_removed"] == len(FLEET["shop"]) - len(kept)

    # Trace: a trimmed cell back to the frame's value in the raw Parquet object.
    trail = store.trace("fleet", row=2, column="shop")
    assert trail["value"] == "Annick Bike Hub"
    assert trail["hops"][0]["value_before"] == " Annick Bike Hub"
    assert trail["end"]["raw_value"] == FLEET["shop"][2]

    # Explain: a summary's total against the library's own group sum.
    store.clean("fleet", "summarize", why="bikes per shop", by=["shop"],
                aggregates=[{"column": "bikes", "func": "sum"}], save_as="per_shop")
    header = store.version("per_shop")["header"]
    summary = store.read("per_shop", library=library, typed=False)
    shops = list(summary["shop"])
    row = shops.index("Ferrow Spokes") + 1
    e = store.explain("per_shop", row=row, column=header[-1])
    if library == "pandas":
        own = kept.assign(shop=kept["shop"].str.strip()).groupby("shop")["bikes"].sum()
        want_sum = int(own["Ferrow Spokes"])
    else:
        own = kept.with_columns(pl.col("shop").str.strip_chars()).group_by("shop").agg(
            pl.col("bikes").sum())
        want_sum = own.filter(pl.col("shop") == "Ferrow Spokes")["bikes"][0]
    assert decimal.Decimal(e["value"]) == want_sum and e["agrees"]

    # Compare, verify and report.
    c = store.compare("fleet:v1", "fleet:v2")
    assert c["paired_by"] == "lineage"
    assert (c["rows"]["removed"], c["rows"]["changed"]) == (1, 1)
    assert store.verify()["intact"]
    rep = store.report("per_shop")
    assert [s["id"] for s in rep["steps"]] == [1, 2, 3]


def test_a_with_block_records_its_source_and_line(store):
    store.receive(store.project / "repairs.csv", as_="repairs", why="weekly export")
    with store.record("repairs", why="clean in pandas") as step:  # the with line
        df = step.input
        df = df[df["service"] != "chain"].drop_duplicates()
        step.output = df.assign(ticket="R-" + df["ticket"])
    r = step.result
    assert r["lineage"] == "exact" and r["fallback"] is None
    # By construction of RAW: the chain job and the repeated ticket removed.
    assert r["rows_removed"] == 2 and r["version"]["n_rows"] == 3
    code = store.timeline("repairs")[-1]["step"]["code"]["python"]
    assert code["file"] == os.path.abspath(__file__)
    assert code["line"] == line_of("# the with line")
    assert code["source"].lstrip().startswith('with store.record("repairs"')
    assert code["source"].rstrip().endswith('step.output = df.assign(ticket="R-" + df["ticket"])')
    # The rewritten key traced back to the raw line.
    trail = store.trace("repairs", row=3, column="ticket")
    assert trail["value"] == "R-7003"
    assert trail["end"]["line"] == raw_lines()["7003"]


def test_a_with_block_that_raises_records_nothing(store):
    store.receive(store.project / "repairs.csv", as_="repairs", why="weekly export")
    before = store.timeline()
    with pytest.raises(KeyError):
        with store.record("repairs", why="a mistake") as step:
            step.output = step.input.drop_duplicates()
            step.input["no such column"]
    assert step.result is None
    assert store.timeline() == before
    assert store.verify()["intact"]
    # A block that assigns no output records nothing either, and says why.
    with pytest.raises(sluice.InputError) as e:
        with store.record("repairs", why="forgot the output") as step:
            step.input.drop_duplicates()
    assert "step.output" in e.value.message
    # A step without a reason is refused before the block runs.
    with pytest.raises(sluice.InputError):
        store.record("repairs")
    assert store.timeline() == before


def test_a_with_block_that_loses_its_labels_is_inferred(store):
    store.receive(store.project / "repairs.csv", as_="repairs", why="weekly export")
    with store.record("repairs", why="dedupe, index reset") as step:
        step.output = step.input.drop_duplicates().reset_index(drop=True)
    r = step.result
    assert r["lineage"] == "inferred" and "no row labels" in r["fallback"]
    assert r["rows_removed"] == 1
    assert store.timeline("repairs")[-1]["step"]["lineage"] == "inferred"


def test_a_polars_with_block(store):
    store.receive(store.project / "repairs.csv", as_="repairs")
    with store.record("repairs", why="upper-case shops", library="polars") as step:
        step.output = step.input.with_columns(pl.col("shop").str.to_uppercase())
    assert step.result["lineage"] == "exact"
    assert step.result["changed_cells"] == 5
    assert json.dumps(store.trace("repairs", row=5, column="shop")["end"]).count(
        "Quillby, east") >= 1
