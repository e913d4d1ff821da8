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
import ast
import getpass
import inspect
import html
import json
import linecache
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

    def __init__(self, message, position=None, result=None):
        super().__init__(message)
        self.message = message
        self.position = json.loads(position) if isinstance(position, str) else position
        # What was done before the error, when the call does several things (a plan run):
        # the record ``run --json`` prints with its error.
        self.result = Record(json.loads(result)) if isinstance(result, str) else result


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


class About(Record):
    """One version in full (``about --json``), shown in a notebook as the version, the step
    that made it and its column profile as a table."""

    def _repr_html_(self):
        v = Version(self["version"])
        step = self.get("step") or {}
        head = "<p><b>%s</b> (blake3:%s): %d rows, %d columns%s</p>" % (
            html.escape(v.label), html.escape(v["hash"][:16]), v["n_rows"], v["n_cols"],
            "" if not step else "; made by step %s (%s) on %s, because: %s" % (
                step.get("id"), html.escape(str(step.get("kind"))),
                html.escape(str(step.get("started_at"))), html.escape(str(step.get("reason")))))
        keys = ("name", "inferred_type", "n_blank", "n_distinct", "min", "max")
        rows = "".join("<tr>%s</tr>" % "".join(
            "<td style='text-align:left'>%s</td>" % _cell(p.get(k)) for k in keys)
            for p in self.get("profile") or [])
        return head + "<table><tr>%s</tr>%s</table>" % (
            "".join("<th>%s</th>" % h for h in ("column", "type", "blank", "distinct", "min",
                                                  "max")), rows)


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


_VISIBLE = {" ": "·", "\t": "→", "\u00a0": "⍽", "\n": "↵", "\r": "␍"}


def _visible(text):
    """White space made visible, as the compare screen shows it."""
    return html.escape("".join(_VISIBLE.get(c, c) for c in text))


def _marked(pieces, side):
    """One side of a changed cell: kept text as it is, the changed characters in « »."""
    out = []
    for p in pieces:
        if p["op"] == "same":
            out.append(_visible(p["text"]))
        elif p["op"] == side:
            out.append("<b>«%s»</b>" % _visible(p["text"]))
    return "".join(out)


class Comparison(Record):
    """Two versions compared (``compare --json``): how rows were paired, the counts, and the
    changes listed, shown in a notebook as the compare screen's table (row, key, column,
    before, after; changed characters in « »)."""

    def _repr_html_(self):
        r = self["rows"]
        head = ("<p><b>%s → %s</b>: %s<br>rows: %d before, %d after; %d kept (%d of them "
                "changed), %d removed, %d added; cells: %d changed</p>" % (
                    html.escape(self["from"]["version"]), html.escape(self["to"]["version"]),
                    html.escape(self["pairing"]), r["from"], r["to"],
                    r["unchanged"] + r["changed"], r["changed"], r["removed"], r["added"],
                    self["cells"]["changed"]))
        rows = []
        for c in self["changes"][:500]:
            key = html.escape(", ".join(c["key"] or []))
            if c["kind"] == "changed":
                for cell in c.get("cells") or []:
                    rows.append("<tr><td>%s → %s</td><td>%s</td><td>%s</td><td>%s</td>"
                                "<td>%s</td></tr>" % (
                                    c["from_row"], c["to_row"], key, html.escape(cell["column"]),
                                    _marked(cell["pieces"], "removed"),
                                    _marked(cell["pieces"], "added")))
            else:
                row = c["from_row"] if c["kind"] == "removed" else c["to_row"]
                rows.append("<tr><td>%s</td><td>%s</td><td colspan='3'>%s: %s</td></tr>" % (
                    row, key, c["kind"], _visible(", ".join(c.get("values") or []))))
        more = ""
        if self["n_changes"] > min(self["listed"], 500):
            more = "<p>… and %d more changes not shown</p>" % (
                self["n_changes"] - min(self["listed"], 500))
        table = ("<table><tr><th>row</th><th>key</th><th>column</th><th>before</th>"
                 "<th>after</th></tr>%s</table>" % "".join(rows)) if rows else ""
        return head + table + more


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


def _with_versions(out):
    """A recording's result as a Record, its versions as Version records (still equal, as
    dicts, to the command's --json output)."""
    for k in ("version", "input", "from", "hand_edit_of"):
        if isinstance(out.get(k), dict):
            out[k] = Version(out[k])
    return Record(out)


def _types(types):
    """Given column types as (column, type) pairs for the engine."""
    return [(str(c), str(t)) for c, t in (types or {}).items()]


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


def _block_source(filename, lineno):
    """The ``with`` statement that starts on (or spans) line ``lineno`` of ``filename`` and its
    block, from the file or, in a notebook, the cell (linecache holds both); None when the
    source cannot be read."""
    lines = linecache.getlines(filename)
    if not lines:
        return None
    try:
        tree = ast.parse("".join(lines))
    except SyntaxError:
        return None
    best = None
    for node in ast.walk(tree):
        if isinstance(node, (ast.With, ast.AsyncWith)):
            header_end = max(i.context_expr.end_lineno for i in node.items)
            if node.lineno <= lineno <= header_end and (best is None or node.lineno > best.lineno):
                best = node
    if best is None:
        return None
    return "".join(lines[best.lineno - 1:best.end_lineno])


class Recording:
    """A step recorded from the dataframe code of a ``with`` block (``Store.record`` without an
    output): ``input`` is the frame to start from, ``output`` the frame to record, ``result``
    what was recorded once the block has ended."""

    def __init__(self, store, input, why, as_, library, filename, lineno):
        self._store, self._why, self._as = store, why, as_
        self._filename, self._lineno = filename, lineno
        if isinstance(input, str):
            self.source_ref = input
            # Read as text, as the version holds it, so that a cell the code leaves alone is
            # written back unchanged.
            self.input = store.read(input, library=library, typed=False)
        else:
            self.source_ref, self.input = _source_of(input), input
        self.output = None
        self.result = None

    def __enter__(self):
        return self

    def __exit__(self, kind, value, tb):
        if kind is not None:
            # The block failed: nothing is recorded, and its exception goes on.
            return False
        if self.output is None:
            raise InputError("nothing was recorded: assign the frame the block made to "
                             "step.output before the block ends")
        self.result = self._store._record(
            self.source_ref, self.output, self._why, self._as, self._filename,
            self._lineno, _block_source(self._filename, self._lineno))
        return False


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
        return _with_versions(out)

    def clean(self, reference, operation, why, save_as=None, **settings):
        """Applies one built-in operation (the names and settings of a plan step: ``trim``,
        ``case`` with ``to="upper"``, ``dedupe`` with ``key=[...]``, ...) to ``reference``."""
        out = json.loads(_call("apply", self.dir, reference, operation, json.dumps(settings),
                               why, self.person, self.email, save_as))
        return _with_versions(out)

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

    def record(self, input, output=None, why=None, as_=None, library="pandas"):
        """Records the frame ``output`` that dataframe code made from ``input`` (a version
        reference, or a frame ``read`` gave) as the next version of ``as_`` (default: the
        input's dataset), with the calling file and line, the source of the calling function
        or cell, and the git state of its folder.

        Without ``output`` it is a context manager: ``with store.record("till:v2", why=...)
        as step:`` gives ``step.input`` (the version read as a ``library`` frame, labels on)
        and records ``step.output``, the frame the block assigns, when the block ends; the
        source recorded is the ``with`` statement and its block. If the block raises, nothing
        is recorded.

        The row map is exact when ``output`` kept the row labels ``read`` put on the rows (a
        pandas index named ``sluice_row``, or a ``sluice_row`` column, which is not recorded as
        data): every output row is paired with the input row its label names, and cells are
        compared by column name. When the labels were lost (an index reset, the column
        dropped) or are not unique, the lineage is inferred by a diff, and the result's
        ``lineage`` and ``fallback`` say so."""
        caller = inspect.currentframe().f_back
        filename, lineno = caller.f_code.co_filename, caller.f_lineno
        if why is None or not str(why).strip():
            raise InputError("a step recorded from dataframe code needs a reason: give why=TEXT")
        if output is None:
            return Recording(self, input, why, as_, library, filename, lineno)
        try:
            source = inspect.getsource(caller.f_code)
        except (OSError, TypeError):
            source = None
        return self._record(input, output, why, as_, filename, lineno, source)

    def _record(self, input, output, why, as_, filename, lineno, source):
        reference = input if isinstance(input, str) else _source_of(input)
        labels, labels_from, table = _labels_of(output)
        dataset = as_ or self.version(reference)["dataset"]
        with tempfile.TemporaryDirectory(prefix="sluice-frame-") as tmp:
            path = os.path.join(tmp, "%s.parquet" % dataset)
            pq.write_table(table, path)
            out = json.loads(_call(
                "record_frame", self.dir, path, reference, dataset, why, self.person,
                self.email, labels, labels_from, os.path.abspath(filename), lineno, source))
        return _with_versions(out)

    def withdraw(self, reference, why, accept_conflicts=False):
        """Takes out the step that made ``reference``, keeping what came after (``sluice
        withdraw``): the record says what was recorded, or the conflicts that refused it."""
        return Record(json.loads(_call("withdraw", self.dir, reference, why,
                                       bool(accept_conflicts), self.person, self.email)))

    # Reading ---------------------------------------------------------------------------

    def arrow(self, reference, typed=True, types=None):
        """A version's rows as a pyarrow Table (Arrow IPC from the engine, no CSV between):
        typed from its profile (int64, exact decimal128, date32, text), or all text; ``types``
        gives columns their types (``{"paid": "decimal(12,2)", "at": "timestamp(ms, UTC)"}``,
        as ``retrieve --column-type``), every value checked."""
        data = _call("read_ipc", self.dir, reference, typed, _types(types))
        return ipc.open_file(pa.BufferReader(data)).read_all()

    def read(self, reference, library="pandas", typed=True, types=None):
        """A version as a pandas (default) or polars DataFrame. Its rows carry their labels
        for ``record``: a pandas index named ``sluice_row``, a polars column ``sluice_row``
        (0-based rows of the version)."""
        table = self.arrow(reference, typed, types)
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

    def write(self, reference, path, format="csv", types=None, deliver=None):
        """Writes a version's rows to ``path`` as ``retrieve --format`` does: csv, tsv, jsonl,
        parquet or arrow; ``types`` as for ``arrow`` (parquet and arrow only). With
        ``deliver`` (the reason: who receives the file and what for) the file is recorded as a
        delivery, as ``retrieve --deliver`` does, and the record is returned (None otherwise)."""
        out = _call("write_file", self.dir, reference, format, os.fspath(path), _types(types),
                    deliver, self.person, self.email)
        return None if out is None else Record(json.loads(out))

    def about(self, reference):
        """One version in full, as ``sluice about --json``: the version, its key, the step that
        made it, its column profile, inspections and sign-offs."""
        return About(json.loads(_call("about", self.dir, reference)))

    def version(self, reference):
        return Version(self.about(reference)["version"])

    def trace(self, reference, row, column):
        """The trail of one cell (``row`` 1-based, as ``sluice retrieve`` counts data rows)."""
        return Trail(json.loads(_call("trace", self.dir, reference, int(row), column)))

    def explain(self, reference, row, column, limit=10):
        return Record(json.loads(_call("explain", self.dir, reference, int(row), column, limit)))

    def compare(self, a, b, key=None, limit=None, counts=False):
        """Two versions compared, as ``sluice compare --json``: how rows were paired, the
        counts, and the changes listed (at most ``limit``; none with ``counts``)."""
        return Comparison(json.loads(_call("compare", self.dir, a, b,
                                           list(key) if key else None, limit, bool(counts))))

    def verify(self, deep=False):
        return Record(json.loads(_call("verify", self.dir, deep)))

    def report(self, reference, sample=5, to=None, reproduce=False):
        """The lineage report of a version: as data, or, with ``to``, written to that file
        (HTML, Markdown or JSON by its ending, as ``sluice report`` writes it) and recorded in
        the audit chain; then the file's hash, the report's own hash and the audit entry."""
        if to is None:
            return Record(json.loads(_call("report", self.dir, reference, sample, self.person,
                                           self.email)))
        return Record(json.loads(_call(
            "write_report", self.dir, reference, os.fspath(to), sample, reproduce,
            self.person, self.email)))

    def timeline(self, dataset=None):
        return [Record(e) for e in json.loads(_call("timeline", self.dir, dataset))]
