#!/usr/bin/env python3
"""Writes the workbooks tests/intake_formats.rs takes in, with general-purpose writers from PyPI, and a
manifest of what each checked cell must become, computed here from the values written.

  orders.xlsx  written by openpyxl (pinned in requirements.txt): sheet "Work orders" (dates, a
               date with a time, a time of day, numbers, text, blanks, a boolean, an error value,
               a formula, a wholly blank row) and sheet "Parts" whose table starts at B3.
               openpyxl stores formulas without a result (it computes nothing), so this script
               writes the cached result into the sheet's XML itself: <v> after the <f> element,
               as a spreadsheet program saves it (ECMA-376 Part 1, 18.3.1.4 c, 18.3.1.96 v).
  orders.ods   written by odfpy (pinned): one sheet "Orders" with floats written with trailing
               zeros, a date, text, a blank, a boolean and a formula whose cached value is in
               office:value (OASIS ODF 1.2 Part 1, 19.385 office:value, 19.642 table:formula).

The expected text of a number is, for the number as written in the file, Python's repr of the float (the shortest string that reads
back as the same binary64, since Python 3.1), written without exponent by the decimal module;
dates are datetime.isoformat(). The expected stored value of an xlsx cell is the text of its
<v> element as written in the file.

  mac1904.xlsx (openpyxl) dates in the 1904 date system, and an empty sheet.
  blank_header.xlsx, repeated_header.xlsx  (openpyxl) workbooks whose header sluice refuses.

Usage: make_workbooks.py OUTDIR  (prints the manifest as JSON)
"""
import datetime
import json
import os
import re
import sys
import zipfile
from decimal import Decimal


def shortest(x):
    """Shortest round-trip decimal of a float, without exponent or trailing zeros."""
    s = format(Decimal(repr(float(x))), "f")
    if "." in s:
        s = s.rstrip("0").rstrip(".")
    return "0" if s in ("-0", "") else s


def col_letters(c):
    out = ""
    while c > 0:
        c, r = divmod(c - 1, 26)
        out = chr(65 + r) + out
    return out


def ref(sheet, row, col):
    plain = re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", sheet) is not None
    name = sheet if plain else "'" + sheet.replace("'", "''") + "'"
    return "%s!%s%d" % (name, col_letters(col), row)


def expected_text(v):
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return shortest(v) if abs(v) > 2**53 else str(v)
    if isinstance(v, float):
        return shortest(v)
    if isinstance(v, datetime.datetime):
        return v.isoformat()
    if isinstance(v, (datetime.date, datetime.time)):
        return v.isoformat()
    return v


def xlsx(out_dir):
    from openpyxl import Workbook

    path = os.path.join(out_dir, "orders.xlsx")
    wb = Workbook()
    ws = wb.active
    ws.title = "Work orders"
    header = ["order_id", "opened", "shop", "parts_cost", "labour_hours", "total", "paid", "note"]
    rows = [
        [41001, datetime.date(2026, 7, 3), "Quillby Cycle Mend", 12.5, 2, None, True, "chain and cassette"],
        [41002, datetime.datetime(2026, 7, 14, 16, 45, 30), "Fennmarsh Bike Clinic", 0.1, 0.75, None, False, None],
        None,  # a wholly blank sheet row: not a data row
        [41003, datetime.date(2024, 2, 29), "Oxwater Wheelworks", 0.30000000000000004, 1.5, None, None, "Ünal's tandem, \"urgent\""],
        [41004, datetime.time(9, 30), "Quillby Cycle Mend", 1234567.891, 3, None, True, "#N/A"],
        [41005, datetime.date(1999, 12, 31), "Fennmarsh Bike Clinic", 1e-7, 12345678901234567890, None, False, "line one\nline two"],
    ]
    for j, h in enumerate(header, start=1):
        ws.cell(row=1, column=j, value=h)
    formulas = {}
    sheet_row = 1
    data_rows = []
    for r in rows:
        sheet_row += 1
        if r is None:
            continue
        for j, v in enumerate(r, start=1):
            if header[j - 1] == "total":
                f = "D%d*E%d" % (sheet_row, sheet_row)
                ws.cell(row=sheet_row, column=j, value="=" + f)
                formulas[ref("Work orders", sheet_row, j)] = (f, r[3] * r[4])
            elif v is not None:
                ws.cell(row=sheet_row, column=j, value=v)
        data_rows.append((sheet_row, r))
    ws["H6"].data_type = "e"  # "#N/A" as an error value, not text

    parts = wb.create_sheet("Parts")
    parts_rows = [["part", "unit_price", "in_stock"], ["brake pads", 8.4, 12], ["inner tube 700c", 5.25, 40]]
    for i, r in enumerate(parts_rows):
        for j, v in enumerate(r):
            parts.cell(row=3 + i, column=2 + j, value=v)
    wb.save(path)
    add_cached_results(path, formulas)

    cells = []
    for data_row, (sheet_row, r) in enumerate(data_rows, start=1):
        for j, v in enumerate(r, start=1):
            name = header[j - 1]
            cell = ref("Work orders", sheet_row, j)
            if name == "total":
                value = shortest(formulas[cell][1])
            elif name == "note" and v == "#N/A":
                value = "#N/A"
            else:
                value = expected_text(v)
            cells.append({"ref": cell, "row": data_row, "column": name, "value": value})
    stored = stored_values(path, "xl/worksheets/sheet1.xml", "Work orders")
    numeric = {ref("Work orders", sr, j)
               for sr, r in data_rows for j, v in enumerate(r, start=1)
               if isinstance(v, (int, float)) and not isinstance(v, bool)}
    for c in cells:
        c["stored"] = stored.get(c["ref"])
        if c["ref"] in numeric and c["stored"] is not None:
            # The number as written in the file (openpyxl itself writes some floats with fewer
            # digits than repr, e.g. 0.30000000000000004 as 0.3): what the file holds is what
            # must be kept.
            c["value"] = shortest(float(c["stored"]))
    parts_cells = []
    for i, r in enumerate(parts_rows[1:], start=1):
        for j, v in enumerate(r):
            parts_cells.append({
                "ref": ref("Parts", 3 + i, 2 + j),
                "row": i,
                "column": parts_rows[0][j],
                "value": expected_text(v),
            })
    return {
        "file": "orders.xlsx",
        "sheets": ["Work orders", "Parts"],
        "header": header,
        "n_rows": len(data_rows),
        "cells": cells,
        "formulas": [{"cell": k, "formula": f, "value": shortest(x)} for k, (f, x) in sorted(formulas.items())],
        "parts_header": parts_rows[0],
        "parts_cells": parts_cells,
    }


def add_cached_results(path, formulas):
    """Writes each formula's result as its cached value (<v>) into the sheet's XML."""
    with zipfile.ZipFile(path) as z:
        items = [(i, z.read(i.filename)) for i in z.infolist()]
    out = []
    for info, data in items:
        if info.filename == "xl/worksheets/sheet1.xml":
            xml = data.decode("utf-8")
            for cell, (f, value) in formulas.items():
                addr = cell.split("!")[1]
                pattern = re.compile(r'(<c r="%s"[^>]*>)<f>([^<]*)</f>(<v\s*/>|<v></v>)?' % addr)
                xml, n = pattern.subn(lambda m: '%s<f>%s</f><v>%s</v>' % (m.group(1), m.group(2), repr(value)), xml)
                assert n == 1, "formula cell %s not found in the sheet XML" % addr
            data = xml.encode("utf-8")
        out.append((info, data))
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as z:
        for info, data in out:
            z.writestr(info, data)


def stored_values(path, member, sheet):
    """The <v> text of every cell of a sheet's XML, by reference."""
    with zipfile.ZipFile(path) as z:
        xml = z.read(member).decode("utf-8")
    found = {}
    for m in re.finditer(r'<c r="([A-Z]+[0-9]+)"[^>]*?(?:/>|>(.*?)</c>)', xml, re.S):
        v = re.search(r"<v>(.*?)</v>", m.group(2) or "")
        if v:
            found[sheet_ref(sheet, m.group(1))] = v.group(1)
    return found


def sheet_ref(sheet, addr):
    col = re.match(r"[A-Z]+", addr).group(0)
    n = 0
    for ch in col:
        n = n * 26 + ord(ch) - 64
    return ref(sheet, int(addr[len(col):]), n)


def ods(out_dir):
    from odf.opendocument import OpenDocumentSpreadsheet
    from odf.table import Table, TableCell, TableRow
    from odf.text import P

    path = os.path.join(out_dir, "orders.ods")
    doc = OpenDocumentSpreadsheet()
    t = Table(name="Orders")
    header = ["order_id", "opened", "parts_cost", "labour_hours", "total", "paid", "note"]
    # (order_id, opened, parts_cost as written, labour_hours, paid, note)
    rows = [
        ("42001", "2026-08-01", "19.90", "1.50", True, "spokes"),
        ("42002", "2026-08-02T10:15:00", "7.00", "0.25", False, None),
        ("42003", "2026-08-03", "0.1", "3", True, "Ødegaard's fixie"),
    ]

    def text_cell(s):
        c = TableCell(valuetype="string")
        c.addElement(P(text=s))
        return c

    def float_cell(s, formula=None):
        kw = {"valuetype": "float", "value": s}
        if formula:
            kw["formula"] = formula
        c = TableCell(**kw)
        c.addElement(P(text=s))
        return c

    tr = TableRow()
    for h in header:
        tr.addElement(text_cell(h))
    t.addElement(tr)
    cells = []
    formulas = []
    for i, (oid, opened, cost, hours, paid, note) in enumerate(rows, start=2):
        tr = TableRow()
        tr.addElement(float_cell(oid))
        d = TableCell(valuetype="date", datevalue=opened)
        d.addElement(P(text=opened))
        tr.addElement(d)
        tr.addElement(float_cell(cost))
        tr.addElement(float_cell(hours))
        total = float(cost) * float(hours)
        f = "of:=[.C%d]*[.D%d]" % (i, i)
        tr.addElement(float_cell(repr(total), formula=f))
        b = TableCell(valuetype="boolean", booleanvalue="true" if paid else "false")
        b.addElement(P(text="TRUE" if paid else "FALSE"))
        tr.addElement(b)
        tr.addElement(text_cell(note) if note is not None else TableCell())
        t.addElement(tr)
        values = [shortest(float(oid)), opened, shortest(float(cost)), shortest(float(hours)),
                  shortest(total), "true" if paid else "false", note or ""]
        for j, (name, value) in enumerate(zip(header, values), start=1):
            cells.append({"ref": ref("Orders", i, j), "row": i - 1, "column": name, "value": value})
        formulas.append({"cell": ref("Orders", i, 5), "formula": f, "value": shortest(total)})
    doc.spreadsheet.addElement(t)
    doc.save(path)
    return {
        "file": "orders.ods",
        "sheets": ["Orders"],
        "header": header,
        "n_rows": len(rows),
        "cells": cells,
        "formulas": formulas,
    }


def refused(out_dir):
    """Workbooks sluice must refuse: a blank header cell (C1), a repeated header name (D1)."""
    from openpyxl import Workbook

    for name, header in (("blank_header.xlsx", ["order_id", "shop", None, "note"]),
                         ("repeated_header.xlsx", ["order_id", "shop", "note", "shop"])):
        wb = Workbook()
        ws = wb.active
        ws.title = "Orders"
        for j, h in enumerate(header, start=1):
            if h is not None:
                ws.cell(row=1, column=j, value=h)
            ws.cell(row=2, column=j, value="x%d" % j)
        wb.save(os.path.join(out_dir, name))


def mac1904(out_dir):
    """A workbook in the 1904 date system (serial 0 is 1904-01-01) with an empty second sheet."""
    from openpyxl import Workbook
    from openpyxl.utils.datetime import CALENDAR_MAC_1904

    wb = Workbook()
    wb.epoch = CALENDAR_MAC_1904
    ws = wb.active
    ws.title = "Orders"
    dates = [datetime.date(2026, 9, 30), datetime.date(1904, 1, 2), datetime.datetime(2026, 9, 1, 8, 5, 7)]
    ws.cell(row=1, column=1, value="opened")
    for i, d in enumerate(dates, start=2):
        ws.cell(row=i, column=1, value=d)
    wb.create_sheet("Empty")
    wb.save(os.path.join(out_dir, "mac1904.xlsx"))
    return [d.isoformat() for d in dates]


def main():
    out_dir = sys.argv[1]
    refused(out_dir)
    print(json.dumps({"xlsx": xlsx(out_dir), "ods": ods(out_dir), "mac1904": mac1904(out_dir)},
                     ensure_ascii=False))


if __name__ == "__main__":
    main()
