"""The package's results hold the same fields and values as the command's --json output: for
each entry point, the Python object is compared with what `sluice ... --json` prints, on the
same store (queries) or on a twin store where the same steps were recorded by the command
(recordings, whose times differ). The command is the binary built from this checkout
(target/debug/sluice, which tests/run builds first; SLUICE_BIN names another)."""
import json
import os
import pathlib
import re
import subprocess

import pytest

import sluice

ROOT = pathlib.Path(__file__).resolve().parents[3]
BIN = os.environ.get("SLUICE_BIN") or str(ROOT / "target" / "debug" / "sluice")
PERSON, EMAIL = "Robin Example", "robin@example.org"

RAW = (
    "ticket,shop,service,labour\n"
    "7001, Quillby Cycle Mend ,puncture,12.50\n"
    "7002,Ferrow Spokes,brake bleed,30\n"
    "7003,annick bike hub,puncture,12.50\n"
    "7002,Ferrow Spokes,brake bleed,30\n"
    "7004,\"Quillby, east\",chain,8.75\n"
)


def command(project, *args, ok=True):
    """`sluice ARGS --json` run in `project` as the same person; its output parsed."""
    assert os.path.isfile(BIN), (
        "the sluice binary is missing at %s: build it with `cargo build` (or set SLUICE_BIN)"
        % BIN)
    env = dict(os.environ, SLUICE_PERSON=PERSON, SLUICE_EMAIL=EMAIL, NO_COLOR="1")
    done = subprocess.run([BIN, *args, "--json"], cwd=project, env=env, capture_output=True,
                          text=True)
    if ok:
        assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


def same_times(value, project):
    """A recording's output with what differs between twin stores made the same: the times,
    and the project folder in file paths."""
    text = json.dumps(value, sort_keys=True).replace(str(project), "PROJECT")
    return json.loads(re.sub(r'"(created_at|at)": "[^"]*"', r'"\1": "TIME"', text))


@pytest.fixture
def twins(tmp_path):
    """Store A, used through the package, and store B, through the command, both holding
    the same raw file and plan."""
    a, b = tmp_path / "a", tmp_path / "b"
    plan = {"sluice_plan": 2,
            "sources": [{"dataset": "jobs", "file": "repairs.csv", "reason": "weekly export"}],
            "steps": [{"dataset": "jobs", "clean": "trim", "reason": "pads"},
                      {"dataset": "jobs", "inspect": [
                          {"dimension": "uniqueness", "columns": ["ticket"]}]}]}
    for p in (a, b):
        p.mkdir()
        (p / "repairs.csv").write_text(RAW, encoding="utf-8")
        (p / "plan.json").write_text(json.dumps(plan), encoding="utf-8")
    store = sluice.Store.setup(a, person=PERSON, email=EMAIL)
    subprocess.run([BIN, "setup"], cwd=b, check=True, capture_output=True,
                   env=dict(os.environ, SLUICE_PERSON=PERSON, SLUICE_EMAIL=EMAIL))
    return store, a, b


def test_recordings_hold_the_commands_fields(twins):
    store, a, b = twins
    py = store.receive(a / "repairs.csv", as_="repairs", why="weekly export")
    cli = command(b, "receive", "repairs.csv", "--as", "repairs", "--why", "weekly export")
    assert same_times(py, a) == same_times(cli, b)
    assert isinstance(py["version"], sluice.Version)

    py = store.clean("repairs", "trim", why="the till pads names")
    cli = command(b, "clean", "repairs", "trim", "--why", "the till pads names")
    assert same_times(py, a) == same_times(cli, b)

    py = store.clean("repairs", "dedupe", why="the export repeats tickets")
    cli = command(b, "clean", "repairs", "dedupe", "--why", "the export repeats tickets")
    assert same_times(py, a) == same_times(cli, b)
    assert py["dropped_rows"] == 1

    os.chdir(a)
    py = store.run("plan.json")
    # The inspection fails (ticket 7002 comes twice), which the command's exit code says.
    cli = command(b, "run", "plan.json", ok=False)
    assert same_times(py, a) == same_times(cli, b)
    assert [d["kind"] for d in py["done"]] == ["input", "clean", "inspect"]
    assert py["completed"] and not py["done"][-1]["passed"]

    py = store.withdraw("repairs:v2", why="trim belongs in the plan")
    cli = command(b, "withdraw", "repairs:v2", "--why", "trim belongs in the plan")
    assert same_times(py, a) == same_times(cli, b)
    assert py["recorded"]


def test_a_stopped_run_carries_the_commands_record(twins):
    store, a, b = twins
    bad = {"sluice_plan": 2,
           "sources": [{"dataset": "jobs", "file": "repairs.csv"}],
           "steps": [{"dataset": "jobs", "clean": "trim", "reason": "pads"},
                     {"dataset": "jobs", "clean": "trim", "settings": {"columns": ["nope"]},
                      "reason": "a column the file lacks"}]}
    for p in (a, b):
        (p / "bad.json").write_text(json.dumps(bad), encoding="utf-8")
    os.chdir(a)
    with pytest.raises(sluice.InputError) as e:
        store.run("bad.json")
    cli = command(b, "run", "bad.json", ok=False)
    assert same_times(e.value.result, a) == same_times(cli, b)
    assert e.value.result["stopped_at"].startswith("plan entry 2 ")
    assert 'column "nope"' in e.value.message


def test_queries_hold_the_commands_fields(twins):
    store, a, _ = twins
    store.receive(a / "repairs.csv", as_="repairs", why="weekly export")
    store.clean("repairs", "trim", why="pads")
    store.clean("repairs", "case", why="title case", columns=["shop"], to="title")
    store.clean("repairs", "summarize", why="labour per shop", by=["shop"],
                aggregates=[{"column": "labour", "func": "sum"}], save_as="by_shop")
    total = store.version("by_shop")["header"][-1]

    assert store.about("repairs:v2") == command(a, "about", "repairs:v2")
    assert store.trace("repairs", row=1, column="shop") == command(
        a, "trace", "repairs", "--row", "1", "--column", "shop")
    assert store.explain("by_shop", row=1, column=total) == command(
        a, "explain", "by_shop", "--row", "1", "--column", total)
    assert store.compare("repairs:v1", "repairs") == command(
        a, "compare", "repairs:v1", "repairs")
    assert store.compare("repairs:v1", "repairs", counts=True) == command(
        a, "compare", "repairs:v1", "repairs", "--counts")
    assert store.compare("repairs:v1", "repairs", key=["ticket"], limit=1) == command(
        a, "compare", "repairs:v1", "repairs", "--key", "ticket", "--limit", "1")
    assert store.verify() == command(a, "verify")
    assert store.timeline() == command(a, "timeline")
    assert store.timeline("repairs") == command(a, "timeline", "--dataset", "repairs")


def test_the_report_holds_the_fields_of_its_json_form(twins):
    store, a, _ = twins
    store.receive(a / "repairs.csv", as_="repairs", why="weekly export")
    store.clean("repairs", "trim", why="pads")
    py = store.report("repairs")
    env = dict(os.environ, SLUICE_PERSON=PERSON, SLUICE_EMAIL=EMAIL)
    subprocess.run([BIN, "report", "repairs", "-o", "r.json"], cwd=a, env=env, check=True,
                   capture_output=True)
    written = json.loads((a / "r.json").read_text(encoding="utf-8"))
    # The written form is sealed with its own hash and made at its own time; the rest agrees.
    py.pop("own_hash"), written.pop("own_hash")
    assert same_times(py, a) == same_times(written, a)


def test_a_delivery_holds_the_commands_fields(twins):
    """store.write(..., deliver=...) records what ``retrieve --deliver`` records: the record it
    returns is the one `identify --json` and `about --json` show for the written file."""
    store, a, _ = twins
    store.receive(a / "repairs.csv", as_="repairs", why="weekly export")
    target = a / "for_the_treasurer.parquet"
    py = store.write("repairs", target, format="parquet", types={"labour": "decimal(6,2)"},
                     deliver="labour lines for the treasurer")
    found = command(a, "identify", str(target))
    assert found["deliveries"] == [py]
    assert command(a, "about", "repairs")["deliveries"] == [py]
    assert py["format"] == "parquet" and py["column_types"] == ["labour=decimal(6,2)"]
    assert py["bytes"] == target.stat().st_size
    assert py["by"] == "%s (%s)" % (PERSON, EMAIL)
    with pytest.raises(sluice.InputError):
        store.write("repairs", a / "nobody.csv", deliver=" ")
    assert not (a / "nobody.csv").exists()
