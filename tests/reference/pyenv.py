#!/usr/bin/env python3
"""Creates (once) the Python virtual environment that holds the outside reference libraries
(pandas, polars) named in requirements.txt, under target/pyref, and prints the path of its
interpreter. Run again, it only checks the environment is complete and prints the path.

Usage: python3 tests/reference/pyenv.py
"""
import hashlib
import os
import subprocess
import sys
import venv

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
ENV = os.path.join(ROOT, "target", "pyref")
REQS = os.path.join(HERE, "requirements.txt")
STAMP = os.path.join(ENV, "requirements.blake2b")


def python_path():
    if os.name == "nt":
        return os.path.join(ENV, "Scripts", "python.exe")
    return os.path.join(ENV, "bin", "python")


def main():
    with open(REQS, "rb") as f:
        wanted = hashlib.blake2b(f.read()).hexdigest()
    py = python_path()
    try:
        with open(STAMP) as f:
            have = f.read().strip()
    except OSError:
        have = None
    if have != wanted or not os.path.exists(py):
        print("pyenv: creating %s with the packages of %s" % (ENV, REQS), file=sys.stderr)
        venv.EnvBuilder(clear=True, with_pip=True).create(ENV)
        subprocess.run(
            [py, "-m", "pip", "install", "--quiet", "--disable-pip-version-check",
             "-r", REQS],
            check=True,
            # Standard output carries only the interpreter's path, for the callers to read.
            stdout=sys.stderr,
        )
        with open(STAMP, "w") as f:
            f.write(wanted + "\n")
    print(py)


if __name__ == "__main__":
    main()
