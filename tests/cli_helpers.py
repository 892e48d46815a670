"""Helpers of the command-line tests: CSV files, folder snapshots, the command run in this process."""

import csv
import os
from pathlib import Path


def write_csv(path, header, rows):
    with open(path, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(header)
        w.writerows(rows)


def read_csv(path):
    """(header, data rows) of a CSV file, cells as text."""
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    return rows[0], rows[1:]


def snapshot(folder):
    """{relative name: bytes} of every regular file below ``folder`` (hidden ones included)."""
    folder = Path(folder)
    return {str(p.relative_to(folder)): p.read_bytes() for p in folder.rglob("*")
            if p.is_file() and not p.is_symlink()}


def cli(args, cwd, capsys):
    """(exit code, stdout, stderr) of ``kalmax.cli.main(args)`` run in ``cwd``."""
    from kalmax import cli as kcli

    old = os.getcwd()
    os.chdir(cwd)
    try:
        try:
            code = kcli.main([str(a) for a in args])
        except SystemExit as e:  # argparse usage errors exit
            code = e.code
    finally:
        os.chdir(old)
    out = capsys.readouterr()
    return code, out.out, out.err
