"""Compares what base R read from the CSV exports (written by read_export.R as
DIR/<name>.r.tsv) with the database, row for row and value for value, through
the same independent joins as check_export.py.

Usage: check_export_r.py DIR (DIR as for check_export.py, after read_export.R).
Exits 1 with every mismatch listed.
"""

from check_export import DIR, TABLES, compare, db, finish, frames


def unescape(text):
    out, i = [], 0
    while i < len(text):
        if text[i] == "\\" and i + 1 < len(text):
            out.append({"\\": "\\", "t": "\t", "n": "\n"}[text[i + 1]])
            i += 2
        else:
            out.append(text[i])
            i += 1
    return "".join(out)


def value(field):
    if field == "":
        return None
    kind, text = field[:2], field[2:]
    if kind == "i:":
        return int(text)
    if kind == "d:":
        return float(text)
    return unescape(text)


def read_r(name):
    lines = (DIR / f"{name}.r.tsv").read_text(encoding="utf-8").split("\n")
    if lines[-1] == "":
        lines.pop()
    columns = [unescape(c) for c in lines[0].split("\t")]
    rows = [dict(zip(columns, map(value, line.split("\t")))) for line in lines[1:]]
    return rows, columns


last_run = db.execute("SELECT max(id) FROM runs").fetchone()[0]
for name, expected in TABLES.items():
    compare(f"{name}.csv (R read.csv)", *read_r(name), expected(last_run))
compare("frames_run1.csv (R read.csv)", *read_r("frames_run1"), frames(1))
finish("R reads the exports equal to the database")
