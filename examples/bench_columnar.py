"""Benchmark of columnar files and of the Python package, against baselines measured in the same
run (medians of --runs, default 3):

  intake   `sluice receive` of a Parquet file of --rows rows (default 1,000,000; Snappy, as
           pyarrow writes by default) into a fresh store, against pyarrow.parquet.read_table of
           the same file (in process);
  read     a version of those rows read into pandas through the package (Store.read, typed
           from the profile, and typed=False, every column as text), against pandas.read_csv of
           `sluice retrieve`'s output (the same rows as CSV; default type inference, and
           dtype=str);
  memory   the peak memory (maximum resident set size, from GNU time) of `sluice receive` of
           the Parquet file and of `sluice retrieve --format parquet` and `--format arrow` of
           its version, against a Python process that reads the same file with pyarrow and
           writes it again as Parquet (pyarrow holds the table in memory).

One command, from the repository's top folder, after `python3 tests/reference/pyenv.py`:

  target/pyref/bin/python examples/bench_columnar.py [--rows N] [--runs N] [--binary PATH]

It builds the release binary and installs the package (release profile) into target/pyref
first (with --binary, it uses that binary and the package as installed), writes its data under target/bench-data/columnar/ and prints a table of times and
ratios, with a JSON summary in target/bench-results/columnar.json.
"""
import argparse
import datetime
import decimal
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

import pyarrow as pa
import pyarrow.parquet as pq

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SHOPS = ["Quillby Cycle Mend", "Ferrow Spokes", "Annick Bike Hub", "Dunmore Wheelworks",
         "Larch Lane Bikes", "Thornbury Pedal Co"]
SERVICES = ["puncture", "brake bleed", "chain", "wheel true", "full service", "gear tune"]


def build():
    subprocess.run(["cargo", "build", "--release", "--quiet", "--bin", "sluice"], cwd=ROOT,
                   check=True)
    env = dict(os.environ, PATH=os.path.dirname(sys.executable) + os.pathsep + os.environ["PATH"])
    subprocess.run([sys.executable, "-m", "pip", "install", "--quiet", "--disable-pip-version-check",
                    "--no-build-isolation", "--no-deps", "--force-reinstall",
                    os.path.join(ROOT, "src", "python")], check=True, env=env)
    return os.path.join(ROOT, "target", "release", "sluice")


def make_parquet(path, rows):
    """A deterministic till export of `rows` rows (a linear congruential sequence)."""
    x = 12345
    ticket, shop, service, amount, day, note = [], [], [], [], [], []
    start = datetime.date(2026, 1, 1)
    for i in range(rows):
        x = (x * 6364136223846793005 + 1442695040888963407) % (1 << 64)
        ticket.append(100000 + i)
        shop.append(SHOPS[(x >> 33) % len(SHOPS)])
        service.append(SERVICES[(x >> 40) % len(SERVICES)])
        amount.append(decimal.Decimal((x >> 20) % 250000) / 100)
        day.append(start + datetime.timedelta(days=(x >> 50) % 365))
        note.append("" if (x >> 13) % 4 else "customer waits")
    t = pa.table({
        "ticket": pa.array(ticket, pa.int64()),
        "shop": pa.array(shop),
        "service": pa.array(service),
        "amount": pa.array(amount, pa.decimal128(10, 2)),
        "day": pa.array(day, pa.date32()),
        "note": pa.array(note),
    })
    pq.write_table(t, path)


def peak_mib(args, env=None):
    """Runs a command to its end under GNU time (/usr/bin/time, Debian's `time` package); its
    peak memory (maximum resident set size) in MiB. Not measured from this process: a child
    forked from it is charged this interpreter's memory (pandas and pyarrow loaded) up to its
    exec, whatever it uses itself."""
    with tempfile.NamedTemporaryFile("r") as f:
        subprocess.run(["/usr/bin/time", "-f", "%M", "-o", f.name, *args], env=env, check=True,
                       stdout=subprocess.DEVNULL)
        return int(f.read().split()[-1]) / 1024


def timed(f):
    t0 = time.perf_counter()
    f()
    return time.perf_counter() - t0


def median_of(runs, f):
    return statistics.median(timed(f) for _ in range(runs))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--binary", help="an existing sluice binary (nothing is built)")
    a = ap.parse_args()
    binary = a.binary or build()
    import pandas as pd
    import sluice

    data = os.path.join(ROOT, "target", "bench-data", "columnar")
    os.makedirs(data, exist_ok=True)
    src = os.path.join(data, "till_%d.parquet" % a.rows)
    if not os.path.exists(src):
        make_parquet(src, a.rows)
    size = os.path.getsize(src)
    env = dict(os.environ, SLUICE_PERSON="Bench Runner")
    results = {"rows": a.rows, "parquet_bytes": size, "runs": a.runs}

    def intake():
        d = tempfile.mkdtemp(prefix="sluice-bench-", dir=os.path.join(ROOT, "target"))
        try:
            subprocess.run([binary, "setup", d], check=True, capture_output=True, env=env)
            subprocess.run([binary, "receive", src, "--as", "till"], cwd=d, check=True,
                           capture_output=True, env=env)
        finally:
            shutil.rmtree(d)

    results["sluice_receive_s"] = median_of(a.runs, intake)
    results["pyarrow_read_table_s"] = median_of(a.runs, lambda: pq.read_table(src))

    d = tempfile.mkdtemp(prefix="sluice-bench-", dir=os.path.join(ROOT, "target"))
    try:
        subprocess.run([binary, "setup", d], check=True, capture_output=True, env=env)
        subprocess.run([binary, "receive", src, "--as", "till"], cwd=d, check=True,
                       capture_output=True, env=env)
        csv_path = os.path.join(d, "till.csv")
        subprocess.run([binary, "retrieve", "till", "-o", csv_path], cwd=d, check=True, env=env)
        store = sluice.Store(d, person="Bench Runner")
        results["package_read_typed_s"] = median_of(a.runs, lambda: store.read("till"))
        results["package_read_text_s"] = median_of(a.runs, lambda: store.read("till", typed=False))
        results["pandas_read_csv_s"] = median_of(a.runs, lambda: pd.read_csv(csv_path))
        results["pandas_read_csv_text_s"] = median_of(
            a.runs, lambda: pd.read_csv(csv_path, dtype=str, keep_default_na=False))
        assert len(store.read("till")) == a.rows
        results["receive_peak_mib"] = peak_mib(
            [binary, "--store", d, "receive", src, "--as", "till_again"], env=env)
        for fmt in ("parquet", "arrow"):
            results["retrieve_%s_peak_mib" % fmt] = peak_mib(
                [binary, "--store", d, "retrieve", "till", "--format", fmt, "-o",
                 os.path.join(d, "out." + fmt)], env=env)
        results["pyarrow_round_trip_peak_mib"] = peak_mib([
            sys.executable, "-c",
            "import sys, pyarrow.parquet as pq; pq.write_table(pq.read_table(sys.argv[1]), "
            "sys.argv[2])", src, os.path.join(d, "pyarrow.parquet")])
    finally:
        shutil.rmtree(d)

    r = results
    print("columnar benchmark: %d rows, Parquet file of %.1f MB, medians of %d runs"
          % (a.rows, size / 1e6, a.runs))
    print("  intake   sluice receive            %7.2f s   %5.1fx pyarrow read_table (%.2f s)"
          % (r["sluice_receive_s"], r["sluice_receive_s"] / r["pyarrow_read_table_s"],
             r["pyarrow_read_table_s"]))
    print("  read     Store.read (typed)        %7.2f s   %5.2fx pandas.read_csv (%.2f s)"
          % (r["package_read_typed_s"], r["package_read_typed_s"] / r["pandas_read_csv_s"],
             r["pandas_read_csv_s"]))
    print("  read     Store.read (typed=False)  %7.2f s   %5.2fx pandas.read_csv dtype=str (%.2f s)"
          % (r["package_read_text_s"], r["package_read_text_s"] / r["pandas_read_csv_text_s"],
             r["pandas_read_csv_text_s"]))
    base = r["pyarrow_round_trip_peak_mib"]
    for what, key in (("receive (Parquet)", "receive_peak_mib"),
                      ("retrieve --format parquet", "retrieve_parquet_peak_mib"),
                      ("retrieve --format arrow", "retrieve_arrow_peak_mib")):
        print("  memory   %-26s %7.0f MiB %5.2fx pyarrow read and write (%.0f MiB)"
              % (what, r[key], r[key] / base, base))
    out = os.path.join(ROOT, "target", "bench-results")
    os.makedirs(out, exist_ok=True)
    r["pandas"] = pd.__version__
    r["pyarrow"] = pa.__version__
    with open(os.path.join(out, "columnar.json"), "w") as f:
        json.dump(r, f, indent=2)


if __name__ == "__main__":
    main()
