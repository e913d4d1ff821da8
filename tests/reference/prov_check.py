#!/usr/bin/env python3
"""Reads sluice's W3C PROV exports with the `prov` package (PyPI; a general-purpose library for
the W3C PROV data model, pinned in requirements.txt) and reports what it found, as JSON on
standard output, for tests/prov_reference.rs to compare with what sluice's store holds.

Every warning is turned into an error, so a record the library only tolerates fails the check.

Checks made here (exit status 1 with the reasons on standard error when one fails):
- the PROV-JSON file parses (W3C Member Submission "PROV-JSON", 2013);
- the PROV-N file parses (W3C Recommendation "PROV-N", 2013) with the library's strict profile;
- the library's own PROV-N serialisation of the PROV-JSON document, parsed again, equals the
  parse of sluice's PROV-N, and so does the PROV-JSON document itself (compared as documents:
  the library's record sets, not text);
- referential integrity, which the library does not check: every identifier a relation names
  is declared, as the kind of record the relation needs;
- time order, which the library does not check either: no activity ends before it starts, a
  usage is not before its activity's start, a generation is not after its activity's end, and
  no entity is used before it was generated.

Usage: prov_check.py EXPORT.prov.json EXPORT.provn
"""
import datetime
import json
import sys
import warnings

warnings.simplefilter("error")

import prov  # noqa: E402
from prov.model import ProvDocument  # noqa: E402

RELATIONS = ["used", "wasGeneratedBy", "wasDerivedFrom", "wasAssociatedWith", "wasAttributedTo"]
# For each relation, which of its arguments must name which kind of record.
REFERENCES = {
    "used": {"prov:activity": "activity", "prov:entity": "entity"},
    "wasGeneratedBy": {"prov:entity": "entity", "prov:activity": "activity"},
    "wasDerivedFrom": {
        "prov:generatedEntity": "entity",
        "prov:usedEntity": "entity",
        "prov:activity": "activity",
        "prov:generation": "wasGeneratedBy",
        "prov:usage": "used",
    },
    "wasAssociatedWith": {"prov:activity": "activity", "prov:agent": "agent", "prov:plan": "entity"},
    "wasAttributedTo": {"prov:entity": "entity", "prov:agent": "agent"},
}


def when(text):
    return datetime.datetime.fromisoformat(text.replace("Z", "+00:00"))


def main():
    json_path, provn_path = sys.argv[1], sys.argv[2]
    problems = []

    with open(json_path, encoding="utf-8") as f:
        from_json = ProvDocument.deserialize(f, format="json")
    with open(provn_path, encoding="utf-8") as f:
        provn_text = f.read()
    from_provn = ProvDocument.deserialize(content=provn_text, format="provn", profile="strict")

    library_provn = from_json.serialize(format="provn")
    again = ProvDocument.deserialize(content=library_provn, format="provn", profile="strict")
    if again != from_provn:
        problems.append("the library's PROV-N of the PROV-JSON document differs from sluice's PROV-N")
    if from_json != from_provn:
        problems.append("the PROV-JSON and PROV-N documents differ as documents")

    counts = {"entity": 0, "activity": 0, "agent": 0}
    for rec in from_json.get_records():
        name = type(rec).__name__
        key = {"ProvEntity": "entity", "ProvActivity": "activity", "ProvAgent": "agent"}.get(name)
        if key:
            counts[key] += 1
    relation_counts = {}
    for rec in from_json.get_records():
        rel = rec.get_type().localpart  # e.g. Usage, Generation
        relation_counts[rel] = relation_counts.get(rel, 0) + 1
    by_kind = {
        "used": relation_counts.get("Usage", 0),
        "wasGeneratedBy": relation_counts.get("Generation", 0),
        "wasDerivedFrom": relation_counts.get("Derivation", 0),
        "wasAssociatedWith": relation_counts.get("Association", 0),
        "wasAttributedTo": relation_counts.get("Attribution", 0),
    }

    # Referential integrity and time order on the raw JSON (plain json module, no library).
    with open(json_path, encoding="utf-8") as f:
        raw = json.load(f)
    declared = {kind: set(raw.get(kind, {})) for kind in ["entity", "activity", "agent"] + RELATIONS}
    for rel in RELATIONS:
        for rid, body in raw.get(rel, {}).items():
            for arg, kind in REFERENCES[rel].items():
                target = body.get(arg)
                if target is not None and target not in declared[kind]:
                    problems.append("%s %s: %s %s is not a declared %s" % (rel, rid, arg, target, kind))
    activities = raw.get("activity", {})
    for aid, body in activities.items():
        start, end = body.get("prov:startTime"), body.get("prov:endTime")
        if start and end and when(end) < when(start):
            problems.append("activity %s ends (%s) before it starts (%s)" % (aid, end, start))
    generated_at = {}
    for gid, body in raw.get("wasGeneratedBy", {}).items():
        act = activities.get(body["prov:activity"], {})
        t = body.get("prov:time")
        if t and act.get("prov:endTime") and when(t) > when(act["prov:endTime"]):
            problems.append("generation %s is after its activity ends" % gid)
        if t:
            generated_at[body["prov:entity"]] = when(t)
    for uid, body in raw.get("used", {}).items():
        act = activities.get(body["prov:activity"], {})
        t = body.get("prov:time")
        if t and act.get("prov:startTime") and when(t) < when(act["prov:startTime"]):
            problems.append("usage %s is before its activity starts" % uid)
        made = generated_at.get(body["prov:entity"])
        if t and made and when(t) < made:
            problems.append("usage %s uses %s before it was generated" % (uid, body["prov:entity"]))

    if problems:
        for p in problems:
            print("prov_check: " + p, file=sys.stderr)
        sys.exit(1)
    print(json.dumps({
        "prov_version": prov.__version__,
        "elements": counts,
        "relations": by_kind,
        "library_provn_statements": sum(
            1 for line in library_provn.splitlines() if line.strip().endswith(")")
        ),
    }, sort_keys=True))


if __name__ == "__main__":
    main()
