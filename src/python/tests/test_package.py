"""The Python package against outside references: pandas' and polars' own readers of the same
bytes, Python's csv module for raw line numbers, and pyarrow for Parquet files. Run by tests/run
(pytest, in the pinned environment target/pyref, with the package built from this checkout)."""
import csv
import io
import json
import os

import pandas as pd
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq
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


@pytest.fixture
def store(tmp_path):
    s = sluice.Store.setup(tmp_path, person="Robin Example", email="robin@example.org")
    (tmp_path / "repairs.csv").write_text(RAW, encoding="utf-8")
    s.project = tmp_path
    return s


def pandas_reading(path):
    # Source: pandas.read_csv, every cell as text, no value taken as missing.
    return pd.read_csv(path, dtype=str, keep_default_na=False)


def test_a_cleaned_version_reads_as_pandas_reads_its_file(store):
    store.receive(store.project / "repairs.csv", as_="repairs", why="weekly export")
    store.clean("repairs", "trim", why="the till pads names")
    store.clean("repairs", "case", why="shop names in title case", columns=["shop"], to="title")
    store.clean("repairs", "dedupe", why="the export repeats tickets")
    got = store.read("repairs", typed=False)
    store.write("repairs", store.project / "out.csv")
    want = pandas_reading(store.project / "out.csv")
    pd.testing.assert_frame_equal(got.fillna("").reset_index(drop=True), want)
    # The cleaning did what the raw text says it should: 5 rows, one repeated.
    assert len(got) == 4
    assert list(got["shop"]) == ["Quillby Cycle Mend", "Ferrow Spokes", "Annick Bike Hub",
                                 "Quillby, East"]
    # Polars reads the same file to the same values (polars.read_csv, all as text).
    pl_want = pl.read_csv(store.project / "out.csv", infer_schema=False)
    pl_got = store.read("repairs", library="polars", typed=False).drop("sluice_row").fill_null("")
    assert pl_got.equals(pl_want)


def test_typed_reading_keeps_decimals_exact(store):
    store.receive(store.project / "repairs.csv", as_="repairs")
    t = store.arrow("repairs")
    assert str(t.schema.field("ticket").type) == "int64"
    # 12.50 and 30 in one column: decimal128 with scale 2, exact (decimal module).
    assert str(t.schema.field("labour").type) == "decimal128(4, 2)"
    import decimal
    assert t.column("labour").to_pylist()[1] == decimal.Decimal("30.00")


@pytest.mark.parametrize("library", ["pandas", "polars"])
def test_frames_in_and_out(store, library):
    data = {"shop": ["Quillby Cycle Mend", "Ferrow Spokes", None],
            "bikes": [3, 12, 7], "paid": ["12.50", "3.10", ""]}
    frame = pd.DataFrame(data) if library == "pandas" else pl.DataFrame(data)
    r = store.receive(frame, as_="fleet", why="from a notebook")
    assert r.recorded and r.version["n_rows"] == 3
    back = store.read("fleet", library=library, typed=False)
    if library == "pandas":
        assert list(back["shop"].fillna("")) == ["Quillby Cycle Mend", "Ferrow Spokes", ""]
        assert list(back["bikes"]) == ["3", "12", "7"]
    else:
        assert back["shop"].fill_null("").to_list() == ["Quillby Cycle Mend", "Ferrow Spokes", ""]
        assert back["bikes"].to_list() == ["3", "12", "7"]
    # The raw object is the Parquet file the frame was written as: pyarrow reads the same rows.
    assert store.verify()["intact"]
    # Receiving the same frame again records nothing.
    assert not store.receive(frame, as_="fleet").recorded


def test_a_trail_ends_at_the_raw_line(store):
    store.receive(store.project / "repairs.csv", as_="repairs", why="weekly export")
    store.clean("repairs", "trim", why="pads")
    store.clean("repairs", "dedupe", why="repeats")
    trail = store.trace("repairs", row=4, column="shop")
    assert trail["value"] == "Quillby, east"
    # Source: Python's csv module, which gives the line each record starts on.
    reader = csv.reader(io.StringIO(RAW))
    lines = {}
    for row in reader:
        lines[row[0]] = reader.line_num
    end = json.dumps(trail["end"])
    assert '"line": %d' % lines["7004"] in end
    assert "Quillby, east" in trail._repr_html_()


def test_compare_explain_report_and_timeline(store):
    store.receive(store.project / "repairs.csv", as_="repairs")
    store.clean("repairs", "trim", why="pads")
    c = store.compare("repairs:v1", "repairs:v2")
    assert c["paired_by"] == "lineage"
    assert c["rows"]["changed"] == 1
    [change] = c["changes"]
    assert (change["from_row"], change["to_row"]) == (1, 1)
    assert [(x["column"], x["old"], x["new"]) for x in change["cells"]] == [
        ("shop", " Quillby Cycle Mend ", "Quillby Cycle Mend")]
    # In a notebook: the compare screen's table, the removed spaces visible and marked.
    page = c._repr_html_()
    assert "<b>«·»</b>Quillby·Cycle·Mend<b>«·»</b>" in page and "<td>1 → 1</td>" in page
    store.clean("repairs", "summarize", why="labour per shop", by=["shop"],
                aggregates=[{"column": "labour", "func": "sum"}], save_as="by_shop")
    total = store.version("by_shop")["header"][-1]
    e = store.explain("by_shop", row=1, column=total)
    assert e["value"] == "12.50"
    rep = store.report("by_shop")
    assert len(rep["steps"]) == 3
    # Written through the engine's report writer, as `sluice report` writes it: the page
    # carries its own hash and names the version; the writing is an audit entry; a file
    # ending that names no form is refused.
    written = store.report("by_shop", to=store.project / "by_shop.html")
    page = (store.project / "by_shop.html").read_text(encoding="utf-8")
    assert written["own_hash"] in page and "by_shop:v1" in page
    assert written["verdict"] in ("passed", "not_checked")
    assert written["audit_entry"] > 0
    with pytest.raises(sluice.InputError):
        store.report("by_shop", to=store.project / "by_shop.pdf")
    assert [t["step"]["id"] for t in store.timeline("repairs")] == [1, 2, 3]
    v = store.version("by_shop")
    assert v.label == "by_shop:v1" and "by_shop:v1" in v._repr_html_()
    # A version in full shows its profile: one table row per column, its type as profiled.
    page = store.about("repairs:v2")._repr_html_()
    assert page.count("<tr>") == 1 + 4 and "<td style='text-align:left'>labour</td>" in page
    assert "labour per shop" not in page and "because: pads" in page


def test_errors_carry_the_engine_message_and_record_nothing(store):
    store.receive(store.project / "repairs.csv", as_="repairs")
    before = len(store.timeline())
    with pytest.raises(sluice.InputError) as e:
        store.clean("repairs", "trim", why="x", columns=["nope"])
    assert 'column "nope"' in e.value.message
    (store.project / "ragged.csv").write_text("a,b\n1,2\n3\n", encoding="utf-8")
    with pytest.raises(sluice.InputError) as e:
        store.receive(store.project / "ragged.csv", as_="ragged")
    assert "expected 2 fields, found 1" in e.value.message
    assert e.value.position["line"] == 3
    assert len(store.timeline()) == before
    assert store.verify()["intact"]


def test_a_plan_runs(store, monkeypatch):
    plan = {"sluice_plan": 2,
            "sources": [{"dataset": "repairs", "file": "repairs.csv"}],
            "steps": [{"dataset": "repairs", "clean": "trim", "reason": "pads"},
                      {"dataset": "repairs", "clean": "dedupe", "reason": "repeats"}]}
    (store.project / "plan.json").write_text(json.dumps(plan), encoding="utf-8")
    out = store.run(store.project / "plan.json")
    assert out["completed"]
    assert [d["kind"] for d in out["done"]] == ["input", "clean", "clean"]
    assert store.version("repairs")["n_rows"] == 4
    # The same plan on another file, bound from the current folder.
    (store.project / "next").mkdir()
    (store.project / "next" / "week2.csv").write_text(RAW.replace("7001", "7101"), encoding="utf-8")
    monkeypatch.chdir(store.project / "next")
    out = store.run(store.project / "plan.json", inputs={"repairs": "week2.csv"})
    assert out["completed"] and store.read("repairs", typed=False)["ticket"][0] == "7101"


def test_parquet_from_pyarrow_reads_back_to_its_values(store):
    # Source: pyarrow writes the file and reads it back; the package gives the same values.
    t = pa.table({"till_id": pa.array([1, 2, 3], pa.int64()),
                  "shop": pa.array(["Quillby", None, "Ferrow"])})
    pq.write_table(t, store.project / "till.parquet")
    store.receive(store.project / "till.parquet", as_="till")
    back = store.arrow("till")
    assert back.column("till_id").to_pylist() == [1, 2, 3]
    assert back.column("shop").to_pylist() == ["Quillby", None, "Ferrow"]
    store.write("till", store.project / "till_out.parquet", format="parquet")
    assert pq.read_table(store.project / "till_out.parquet").equals(back)


def raw_lines():
    # Source: Python's csv module: the line each ticket's record starts on.
    reader = csv.reader(io.StringIO(RAW))
    lines = {}
    for row in reader:
        lines.setdefault(row[0], reader.line_num)
    return lines


def clean_with_pandas(df):
    """A dataframe script: filter, de-duplicate, fix the key column, merge a lookup."""
    df = df[df["service"] != "chain"]
    df = df.drop_duplicates()
    df = df.assign(shop=df["shop"].str.strip().str.upper(), ticket="R-" + df["ticket"])
    towns = pd.DataFrame({"shop": ["QUILLBY CYCLE MEND", "FERROW SPOKES", "ANNICK BIKE HUB"],
                          "town": ["Quillby", "Ferrow", "Annick"]})
    # merge makes a new index: the labels go through a column and back.
    return df.reset_index().merge(towns, on="shop", how="left").set_index("sluice_row")


def test_dataframe_code_that_keeps_its_labels_is_recorded_exactly(store):
    store.receive(store.project / "repairs.csv", as_="repairs", why="weekly export")
    df = store.read("repairs", typed=False)
    out = clean_with_pandas(df)
    r = store.record(df, out, why="clean in pandas")
    assert r["lineage"] == "exact" and r["fallback"] is None
    # By construction of RAW: one chain row filtered, one repeated ticket removed.
    assert r["rows_removed"] == 2 and r["version"]["n_rows"] == 3
    assert {c["column"]: c["cells"] for c in r["changed_by_column"]} == {"shop": 3, "ticket": 3}
    # The trail of a rewritten key goes back through the step to the raw line.
    trail = store.trace("repairs", row=3, column="ticket")
    assert trail["value"] == "R-7003"
    hop = trail["hops"][0]
    assert hop["value_before"] == "7003" and hop["value_after"] == "R-7003"
    assert '"line": %d' % raw_lines()["7003"] in json.dumps(trail["end"])
    # The code is recorded: this file, the calling line, the function's source.
    step = store.timeline("repairs")[-1]["step"]
    assert step["lineage"] == "exact"
    assert step["code"]["python"]["file"] == os.path.abspath(__file__)
    assert "store.record(df, out" in step["code"]["python"]["source"]
    # Values read back equal pandas' own reading of the cleaned file.
    store.write("repairs", store.project / "cleaned.csv")
    want = pandas_reading(store.project / "cleaned.csv")
    got = store.read("repairs", typed=False).reset_index(drop=True).fillna("")
    pd.testing.assert_frame_equal(got, want)
    assert store.verify()["intact"]


def test_dataframe_code_that_loses_its_labels_is_recorded_as_inferred(store):
    store.receive(store.project / "repairs.csv", as_="repairs", why="weekly export")
    df = store.read("repairs", typed=False)
    out = clean_with_pandas(df).reset_index(drop=True)
    r = store.record("repairs:v1", out, why="clean in pandas, index reset")
    assert r["lineage"] == "inferred"
    assert "no row labels" in r["fallback"]
    assert store.timeline("repairs")[-1]["step"]["lineage"] == "inferred"
    # Labels on two rows at once are not a row map either.
    twice = df.iloc[[0, 0, 1]]
    r = store.record("repairs:v1", twice, why="a row twice", as_="twice")
    assert r["lineage"] == "inferred" and "more than one row" in r["fallback"]
    assert store.verify()["intact"]


def test_polars_code_that_keeps_the_row_id_column_is_exact(store):
    store.receive(store.project / "repairs.csv", as_="repairs")
    df = store.read("repairs", library="polars", typed=False)
    out = (df.filter(pl.col("service") != "chain")
             .with_columns(pl.col("shop").str.strip_chars()))
    r = store.record("repairs", out, why="clean in polars")
    assert r["lineage"] == "exact"
    assert r["rows_removed"] == 1
    assert "sluice_row" not in store.version("repairs")["header"]
    trail = store.trace("repairs", row=3, column="shop")
    assert trail["value"] == "annick bike hub"
    assert '"line": %d' % raw_lines()["7003"] in json.dumps(trail["end"])


@pytest.mark.parametrize("fmt", ["parquet", "arrow"])
def test_a_file_of_many_batches_is_taken_in_to_pyarrows_values(store, fmt):
    # 20,000 rows in row groups (record batches) of 7,000: the intake converts batch by batch
    # (8,192 rows at most), and with a key checked it holds the table whole; both give the
    # rows pyarrow reads from the file, in order, and the same version.
    import pyarrow.ipc as ipc
    n = 20_000
    t = pa.table({"ticket": pa.array(range(n), pa.int64()),
                  "shop": pa.array(["Quillby" if i % 3 else None for i in range(n)]),
                  "labour": pa.array([decimal_of(i) for i in range(n)], pa.decimal128(8, 2))})
    path = store.project / ("many." + fmt)
    if fmt == "parquet":
        pq.write_table(t, path, row_group_size=7_000)
    else:
        with ipc.new_file(path, t.schema) as w:
            for b in t.to_batches(max_chunksize=7_000):
                w.write_batch(b)
    streamed = store.receive(path, as_="many")
    keyed = store.receive(path, as_="many_keyed", key=["ticket"])
    assert streamed["version"]["hash"] == keyed["version"]["hash"]
    back = store.arrow("many", typed=False)
    want = pq.read_table(path) if fmt == "parquet" else ipc.open_file(path).read_all()
    assert back.column("ticket").to_pylist() == [str(v) for v in want.column("ticket").to_pylist()]
    assert back.column("shop").to_pylist() == want.column("shop").to_pylist()
    assert back.column("labour").to_pylist() == [str(v) for v in want.column("labour").to_pylist()]
    trail = store.trace("many", row=15_001, column="labour")
    assert trail["value"] == str(want.column("labour")[15_000].as_py())


def decimal_of(i):
    import decimal
    return decimal.Decimal(i % 9973) / 100
