"""sluice from Python: a store's versions, steps and trails, with pandas and polars frames.

A thin layer over the sluice engine (the native module ``sluice._engine``): every call records or
reads through the same code as the ``sluice`` command, in the same store, and every result holds
the fields the command's ``--json`` output holds.

    import sluice
    store = sluice.Store.setup("project", person="Robin Example")
    v1 = store.receive("till.parquet", as_="till", why="July export")
    v2 = store.clean("till", "trim", why="the till pads names")
    frame = store.read("till")              # a pandas DataFrame, through Arrow
    store.trace("till", row=3, column="shop")
"""
import getpass
import inspect
import html
import json
import os
import tempfile

import pyarrow as pa
import pyarrow.ipc as ipc
import pyarrow.parquet as pq

from . import _engine


class SluiceError(Exception):
    """An error of the engine: ``message`` as the command line words it, and ``position`` (a
    dict of byte, line, record, column) for input errors that have one. Whatever failed, the
    store is as it was before the call."""

    def __init__(self, message, position=None):
        super().__init__(message)
        self.message = message
        self.position = json.loads(position) if isinstance(position, str) else position


class InputError(SluiceError):
    """A usage or input error (the command line's exit code 2): nothing was recorded."""


class DataError(SluiceError):
    """The data, the store or the system failed (exit code 1)."""


def _call(name, *args):
    try:
        return getattr(_engine, name)(*args)
    except _engine.InputError as e:
        raise InputError(*e.args) from None
    except _engine.SluiceError as e:
        raise DataError(*e.args) from None

__all__ = ["Store", "Record", "SluiceError", "InputError", "DataError"]


class Record(dict):
    """A result of the engine: a dict with the fields of the command's --json output, shown as
    an HTML table in a notebook."""

    title = "sluice"

    def __getattr__(self, name):
        try:
            return self[name]
        except KeyError:
            raise AttributeError(name) from None

    def _repr_html_(self):
        return _html_table(self.title, self)


def _cell(value):
    if isinstance(value, (dict, list)):
        text = json.dumps(value, ensure_ascii=False)
        if len(text) > 200:
            text = text[:200] + "…"
        return html.escape(text)
    return html.escape("" if value is None else str(value))


def _html_table(title, fields):
    rows = "".join(
        "<tr><th style='text-align:left'>%s</th><td style='text-align:left'>%s</td></tr>"
        % (html.escape(str(k)), _cell(v))
        for k, v in fields.items()
    )
    return "<table><caption style='text-align:left'><b>%s</b></caption>%s</table>" % (
        html.escape(title), rows)


class Version(Record):
    """One version: dataset, seq, hash, n_rows, n_cols, header, ... (as ``about --json``)."""

    @property
    def label(self):
        return "%s:v%d" % (self["dataset"], self["seq"])

    def _repr_html_(self):
        shown = {k: self[k] for k in ("dataset", "seq", "hash", "n_rows", "n_cols", "header",
                                      "created_at") if k in self}
        return _html_table(self.label, shown)


class Trail(Record):
    """Where a value came from: the hops from a cell back to its raw file (``trace --json``)."""

    def _repr_html_(self):
        head = "<p><b>%s</b> of %s, data row %s: <code>%s</code></p>" % (
            html.escape(self["column"]), html.escape(self["version"]), self["row"],
            html.escape(self["value"]))
        keys = ("step", "operation", "why", "row_before", "value_before", "row_after",
                "value_after", "changed")
        rows = "".join("<tr>%s</tr>" % "".join(
            "<td style='text-align:left'>%s</td>" % _cell(hop.get(k)) for k in keys)
            for hop in self["hops"])
        end = "<p>ends at: <code>%s</code></p>" % _cell(self.get("end"))
        return head + ("<table><tr>%s</tr>%s</table>" % (
            "".join("<th>%s</th>" % k.replace("_", " ") for k in keys), rows)) + end


class Comparison(Record):
    """Two versions compared: pairing, counts, every changed cell, removed and added rows."""

    def _repr_html_(self):
        head = ("<p><b>%s → %s</b> (rows paired by %s): %d changed, %d removed, %d added, "
                "%d unchanged</p>" % (html.escape(self["a"]), html.escape(self["b"]),
                                      html.escape(self["matched_by"]["by"]),
                                      self["rows_changed"], self["rows_removed"],
                                      self["rows_added"], self["rows_unchanged"]))
        cells = "".join(
            "<tr><td>%s</td><td>%s</td><td>%s</td><td style='color:#a33'>%s</td>"
            "<td style='color:#264'>%s</td></tr>"
            % (c["row_a"], c["row_b"], _cell(c["column"]), _cell(c["old"]), _cell(c["new"]))
            for c in self["cells"][:200])
        return head + ("<table><tr><th>row in %s</th><th>row in %s</th><th>column</th>"
                       "<th>old</th><th>new</th></tr>%s</table>"
                       % (html.escape(self["a"]), html.escape(self["b"]), cells))


LABEL = "sluice_row"


def _source_of(frame):
    try:
        return frame.attrs["sluice_version"]
    except (AttributeError, KeyError):
        raise TypeError("input: give the version reference the frame was read from "
                        "(e.g. \"till:v2\")") from None


def _labels_of(frame):
    """(labels or None, where they came from, the frame as an Arrow table without them)."""
    mod = type(frame).__module__.split(".")[0]
    if mod == "polars":
        if LABEL in frame.columns:
            labels = frame[LABEL].to_list()
            return ([int(x) for x in labels] if None not in labels else None,
                    "column " + LABEL, frame.drop(LABEL).to_arrow())
        return None, "", frame.to_arrow()
    if mod == "pandas":
        import pandas
        table = pa.Table.from_pandas(frame, preserve_index=False)
        idx = frame.index
        if idx.name == LABEL and pandas.api.types.is_integer_dtype(idx.dtype):
            return [int(x) for x in idx], "pandas index " + LABEL, table
        return None, "", table
    return None, "", _to_arrow(frame)


def _bound(value):
    """A plan input's binding: a file (relative to the current folder, as on the command
    line) or a version reference."""
    value = os.fspath(value)
    return os.path.abspath(value) if os.path.isfile(value) else value


def _who(person, email):
    """Who acts: the given person, else SLUICE_PERSON, else the operating system user (the
    same order as the command line, without its store setting)."""
    name = person or os.environ.get("SLUICE_PERSON") or getpass.getuser()
    return name, email or os.environ.get("SLUICE_EMAIL")


def _to_arrow(frame):
    """A pandas or polars frame (or a pyarrow Table) as a pyarrow Table."""
    if isinstance(frame, pa.Table):
        return frame
    mod = type(frame).__module__.split(".")[0]
    if mod == "polars":
        return frame.to_arrow()
    if mod == "pandas":
        return pa.Table.from_pandas(frame, preserve_index=False)
    raise TypeError("expected a pandas or polars DataFrame or a pyarrow Table, got %s"
                    % type(frame).__name__)


class Store:
    """A sluice store (its folder ``sluice-store``), opened from a project folder."""

    def __init__(self, path=".", person=None, email=None):
        self.dir = _call("store_dir", os.fspath(path))
        self.person, self.email = _who(person, email)

    @classmethod
    def setup(cls, path=".", person=None, email=None):
        """Sets up a store in the project folder ``path`` and opens it."""
        name, mail = _who(person, email)
        os.makedirs(path, exist_ok=True)
        _call("setup", os.fspath(path), name, mail)
        return cls(path, person=name, email=mail)

    # Recording -------------------------------------------------------------------------

    def receive(self, source, as_, why=None, key=None, null_tokens=(), sheet=None):
        """Records a file (any format ``sluice receive`` reads) or a pandas/polars frame as the
        next version of dataset ``as_``. A frame is written as a Parquet file (its columns and
        types kept), which is stored byte for byte as the raw object."""
        if isinstance(source, (str, os.PathLike)):
            path = os.fspath(source)
            return self._received(path, as_, why, key, null_tokens, sheet)
        table = _to_arrow(source)
        with tempfile.TemporaryDirectory(prefix="sluice-frame-") as tmp:
            path = os.path.join(tmp, "%s.parquet" % as_)
            pq.write_table(table, path)
            return self._received(path, as_, why, key, null_tokens, sheet)

    def _received(self, path, as_, why, key, null_tokens, sheet):
        out = json.loads(_call("receive", 
            self.dir, path, as_, why, self.person, self.email,
            list(key) if key else None, list(null_tokens), sheet))
        out["version"] = Version(out["version"])
        return Record(out)

    def clean(self, reference, operation, why, save_as=None, **settings):
        """Applies one built-in operation (the names and settings of a plan step: ``trim``,
        ``case`` with ``to="upper"``, ``dedupe`` with ``key=[...]``, ...) to ``reference``."""
        out = json.loads(_call("apply", self.dir, reference, operation, json.dumps(settings),
                                       why, self.person, self.email, save_as))
        out["version"] = Version(out["version"])
        return Record(out)

    def run(self, plan, inputs=None):
        """Runs a plan file; ``inputs`` binds plan inputs to files (relative to the current
        folder) or stored versions."""
        plan = os.fspath(plan)
        with open(plan, encoding="utf-8") as f:
            text = f.read()
        return Record(json.loads(_call("run_plan", 
            self.dir, text, plan, os.path.dirname(os.path.abspath(plan)),
            [(k, _bound(v)) for k, v in (inputs or {}).items()],
            self.person, self.email)))

    def record(self, input, output, why, as_=None):
        """Records the frame ``output`` that dataframe code made from ``input`` (a version
        reference, or a frame ``read`` gave) as the next version of ``as_`` (default: the
        input's dataset), with the calling file and line, the source of the calling function
        or cell, and the git state of its folder.

        The row map is exact when ``output`` kept the row labels ``read`` put on the rows (a
        pandas index named ``sluice_row``, or a ``sluice_row`` column, which is not recorded as
        data): every output row is paired with the input row its label names, and cells are
        compared by column name. When the labels were lost (an index reset, the column
        dropped) or are not unique, the lineage is inferred by a diff, and the result's
        ``lineage`` and ``fallback`` say so."""
        reference = input if isinstance(input, str) else _source_of(input)
        labels, labels_from, table = _labels_of(output)
        frame = inspect.stack()[1]
        try:
            source = inspect.getsource(frame.frame.f_code)
        except (OSError, TypeError):
            source = None
        dataset = as_ or self.version(reference)["dataset"]
        with tempfile.TemporaryDirectory(prefix="sluice-frame-") as tmp:
            path = os.path.join(tmp, "%s.parquet" % dataset)
            pq.write_table(table, path)
            out = json.loads(_call(
                "record_frame", self.dir, path, reference, dataset, why, self.person,
                self.email, labels, labels_from, os.path.abspath(frame.filename),
                frame.lineno, source))
        out["version"] = Version(out["version"])
        return Record(out)

    # Reading ---------------------------------------------------------------------------

    def arrow(self, reference, typed=True):
        """A version's rows as a pyarrow Table (Arrow IPC from the engine, no CSV between):
        typed from its profile (int64, exact decimal128, date32, text), or all text."""
        data = _call("read_ipc", self.dir, reference, typed)
        return ipc.open_file(pa.BufferReader(data)).read_all()

    def read(self, reference, library="pandas", typed=True):
        """A version as a pandas (default) or polars DataFrame. Its rows carry their labels
        for ``record``: a pandas index named ``sluice_row``, a polars column ``sluice_row``
        (0-based rows of the version)."""
        table = self.arrow(reference, typed)
        label = self.version(reference).label
        if library == "pandas":
            frame = table.to_pandas()
            frame.index.name = LABEL
            frame.attrs["sluice_version"] = label
            return frame
        if library == "polars":
            import polars
            return polars.from_arrow(table).with_row_index(LABEL)
        if library == "arrow":
            return table
        raise ValueError("library: expected \"pandas\", \"polars\" or \"arrow\"")

    def write(self, reference, path, format="csv"):
        """Writes a version's rows to ``path`` as ``retrieve --format`` does: csv, tsv, jsonl,
        parquet or arrow."""
        _call("write_file", self.dir, reference, format, os.fspath(path))

    def about(self, reference):
        return Record(json.loads(_call("about", self.dir, reference)))

    def version(self, reference):
        return Version(self.about(reference)["version"])

    def trace(self, reference, row, column):
        """The trail of one cell (``row`` 1-based, as ``sluice retrieve`` counts data rows)."""
        return Trail(json.loads(_call("trace", self.dir, reference, int(row), column)))

    def explain(self, reference, row, column, limit=10):
        return Record(json.loads(_call("explain", self.dir, reference, int(row), column, limit)))

    def compare(self, a, b, key=None):
        return Comparison(json.loads(_call("compare", self.dir, a, b,
                                                     list(key) if key else None)))

    def verify(self, deep=False):
        return Record(json.loads(_call("verify", self.dir, deep)))

    def report(self, reference, sample=20, to=None, reproduce=False):
        """The lineage report of a version: as data, or, with ``to``, written to that file
        (HTML, Markdown or JSON by its ending, as ``sluice report`` writes it) and recorded in
        the audit chain; then the file's hash, the report's own hash and the audit entry."""
        if to is None:
            return Record(json.loads(_call("report", self.dir, reference, sample, self.person)))
        return Record(json.loads(_call(
            "write_report", self.dir, reference, os.fspath(to), sample, reproduce,
            self.person, self.email)))

    def timeline(self, dataset=None):
        return [Record(e) for e in json.loads(_call("timeline", self.dir, dataset))]
