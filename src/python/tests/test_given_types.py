"""Column types given for a Parquet or Arrow IPC output, checked against pyarrow's reading of
the files (the Apache Arrow project's Python library, the outside reference) and Python's own
decimal and datetime parsing of the same text."""
import datetime
import decimal
import os
import pathlib
import subprocess

import pyarrow as pa
import pyarrow.ipc as ipc
import pyarrow.parquet as pq
import pytest

import sluice

ROOT = pathlib.Path(__file__).resolve().parents[3]
BIN = os.environ.get("SLUICE_BIN") or str(ROOT / "target" / "debug" / "sluice")

ROWS = [
    # id, paid, day, opened, code
    ("1", "12.50", "2026-10-01", "2026-10-01T09:14:03.250Z", "007"),
    ("2", "3.1", "2026-10-02", "2026-10-01 11:14:03+02:00", "010"),
    ("3", "-0.05", "2026-02-28", "2026-10-01T07:00", "100"),
    ("4", "", "", "", ""),
]
TYPES = {"id": "integer", "paid": "decimal(12,2)", "day": "date",
         "opened": "timestamp(ms, UTC)", "code": "text"}


@pytest.fixture
def store(tmp_path):
    s = sluice.Store.setup(tmp_path, person="Robin Example")
    text = "id,paid,day,opened,code\n" + "".join(",".join(r) + "\n" for r in ROWS)
    (tmp_path / "jobs.csv").write_text(text, encoding="utf-8")
    s.receive(tmp_path / "jobs.csv", as_="jobs", why="the job sheet")
    s.project = tmp_path
    return s


def expected():
    """The values the given types should hold, from Python's own parsers (decimal.Decimal,
    date.fromisoformat, datetime.fromisoformat; a time without an offset is in the column's
    zone, UTC)."""
    def when(s):
        if not s:
            return None
        t = datetime.datetime.fromisoformat(s.replace("Z", "+00:00"))
        if t.tzinfo is None:
            t = t.replace(tzinfo=datetime.timezone.utc)
        return t.astimezone(datetime.timezone.utc)
    return {
        "id": [int(r[0]) for r in ROWS],
        "paid": [decimal.Decimal(r[1]).quantize(decimal.Decimal("0.01")) if r[1] else None
                 for r in ROWS],
        "day": [datetime.date.fromisoformat(r[2]) if r[2] else None for r in ROWS],
        "opened": [when(r[3]) for r in ROWS],
        "code": [r[4] or None for r in ROWS],
    }


def as_utc(values):
    return [v.astimezone(datetime.timezone.utc) if v is not None else None for v in values]


@pytest.mark.parametrize("fmt", ["parquet", "arrow"])
def test_given_types_read_back_by_pyarrow(store, fmt):
    out = store.project / ("jobs." + fmt)
    store.write("jobs", out, format=fmt, types=TYPES)
    table = pq.read_table(out) if fmt == "parquet" else ipc.open_file(out).read_all()
    assert table.schema.field("id").type == pa.int64()
    assert table.schema.field("paid").type == pa.decimal128(12, 2)
    assert table.schema.field("day").type == pa.date32()
    assert table.schema.field("opened").type == pa.timestamp("ms", tz="UTC")
    assert table.schema.field("code").type == pa.string()
    want = expected()
    for column in ("id", "paid", "day", "code"):
        assert table.column(column).to_pylist() == want[column], column
    assert as_utc(table.column("opened").to_pylist()) == want["opened"]
    # Deterministic: the same version and types give the same bytes, from the command too.
    again = store.project / ("again." + fmt)
    store.write("jobs", again, format=fmt, types=TYPES)
    assert out.read_bytes() == again.read_bytes()
    args = [a for c, t in TYPES.items() for a in ("--column-type", "%s=%s" % (c, t))]
    by_command = store.project / ("command." + fmt)
    subprocess.run([BIN, "retrieve", "jobs", "--format", fmt, *args, "-o", str(by_command)],
                   cwd=store.project, check=True, capture_output=True)
    assert by_command.read_bytes() == out.read_bytes()
    # The same types straight into a frame.
    t = store.arrow("jobs", types={"paid": "decimal(12,2)", "code": "text"})
    assert t.column("paid").to_pylist() == want["paid"]
    assert t.column("code").to_pylist() == want["code"]


def test_an_offset_zone_and_a_naive_timestamp(store):
    t = store.arrow("jobs", types={"opened": "timestamp(us, +02:00)"})
    assert t.schema.field("opened").type == pa.timestamp("us", tz="+02:00")
    want = expected()["opened"]
    # Row 3 has no offset: it is read in the column's zone, +02:00, so 2 hours earlier in UTC.
    want[2] = want[2] - datetime.timedelta(hours=2)
    assert as_utc(t.column("opened").to_pylist()) == want
    # Without a zone, a value with an offset is refused; a value without one is kept as is.
    with pytest.raises(sluice.InputError) as e:
        store.arrow("jobs", types={"opened": "timestamp(ms)"})
    assert 'data row 1, column "opened"' in e.value.message
    assert "carries a UTC offset" in e.value.message


@pytest.mark.parametrize("given, row, column, says", [
    # 12.50 fits a scale of 1 exactly (its last digit is a zero); -0.05 does not.
    ("decimal(12,1)", 3, "paid", "more than the scale of 1 keeps"),
    ("decimal(3,2)", 1, "paid", "leaves room for 1"),
    ("integer", 1, "paid", "is not a whole number"),
    ("date", 1, "code", "is not an ISO 8601 calendar date"),
    ("timestamp(s, UTC)", 1, "opened", "more than a unit of s keeps"),
])
def test_a_value_that_does_not_fit_is_refused_with_its_place(store, given, row, column, says):
    target = store.project / "refused.parquet"
    with pytest.raises(sluice.InputError) as e:
        store.write("jobs", target, format="parquet", types={column: given})
    assert says in e.value.message and given in e.value.message
    # The place: the data row, its line in the version (the header is line 1) and the column.
    assert "data row %d, column \"%s\"" % (row, column) in e.value.message
    assert e.value.position["line"] == row + 1
    assert e.value.position["column"] == list(TYPES).index(column) + 1
    assert not target.exists()
    # The command refuses it alike: exit code 2, the same place, no file left behind.
    done = subprocess.run([BIN, "retrieve", "jobs", "--format", "parquet", "--column-type",
                           "%s=%s" % (column, given), "-o", str(target)],
                          cwd=store.project, capture_output=True, text=True)
    assert done.returncode == 2
    assert "data row %d, column \"%s\"" % (row, column) in done.stderr
    assert not target.exists()


def test_types_that_cannot_be_given(store):
    for bad in ("decimal(40,2)", "decimal(4,5)", "timestamp(ms, Europe/Oslo)", "float",
                "timestamp(minutes)"):
        with pytest.raises(sluice.InputError):
            store.arrow("jobs", types={"paid": bad})
    with pytest.raises(sluice.InputError) as e:
        store.arrow("jobs", types={"nope": "text"})
    assert 'column "nope"' in e.value.message
    with pytest.raises(sluice.InputError):
        store.write("jobs", store.project / "x.csv", format="csv", types={"paid": "text"})
