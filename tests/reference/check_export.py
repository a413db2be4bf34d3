"""Reads the tables `framewarden export` wrote with general-purpose readers
(pandas for CSV; pyarrow, pandas and DuckDB for Parquet) and compares them, row for
row and value for value, with what Python's own sqlite3 module reads from the
same database through joins written here independently of the Rust code.

Usage: check_export.py DIR, where DIR holds fw.db, <table>.csv and
<table>.parquet for frames, objects, alerts and flags (the last run), and
frames_run1.csv (`--run 1`). Exits 1 with every mismatch listed.
"""

import datetime
import math
import re
import sqlite3
import sys
from pathlib import Path

import pandas as pd
import duckdb
import pyarrow as pa
import pyarrow.parquet as pq

DIR = Path(sys.argv[1])
db = sqlite3.connect(DIR / "fw.db")
db.row_factory = sqlite3.Row


def iso(ms):
    """Epoch ms as RFC 3339 UTC with milliseconds (what the export writes)."""
    if ms is None:
        return None
    t = datetime.datetime.fromtimestamp(ms // 1000, tz=datetime.timezone.utc)
    return t.strftime("%Y-%m-%dT%H:%M:%S.") + f"{ms % 1000:03d}Z"


def time_point(text):
    """The time point as an integer when the text is all ASCII digits."""
    return int(text) if text is not None and re.fullmatch(r"[0-9]+", text) else None


def position(f):
    return {
        "well": f["well"],
        "site": f["site"],
        "time_point": time_point(f["time_point"]),
        "time_point_text": f["time_point"],
        "channel": f["channel"],
    }


def frames(run):
    out = []
    for f in db.execute("SELECT * FROM frames WHERE run_id = ? ORDER BY id", (run,)):
        flags = [r[0] for r in db.execute("SELECT flag FROM flags WHERE frame_id = ? ORDER BY id", (f["id"],))]
        used = f["recount_object_count"] if f["recount_object_count"] is not None else f["object_count"]
        row = {"run": f["run_id"], "frame_id": f["id"], "file": f["file"], "version": f["version"]}
        row.update(position(f))
        row.update({
            "status": f["status"],
            "error": f["error"],
            "count_used": used,
            "count_source": None if f["object_count"] is None else (f["count_source"] or "raw"),
            "object_count": f["object_count"],
            "recount_object_count": f["recount_object_count"],
            "size_filtered": f["size_filtered"],
            "method": f["method"],
        })
        for name in ["threshold", "recount_threshold", "separability", "bimodality",
                     "foreground_fraction", "merged_fraction", "dim_objects", "dim_level",
                     "background_level",
                     "saturation_fraction", "focus", "illumination_change"]:
            row[name] = f[name]
        row.update({
            "width_px": f["width"],
            "height_px": f["height"],
            "bit_depth": f["bit_depth"],
            "pixel_size_um": f["pixel_size_um"],
            "pixel_size_source": f["pixel_size_source"],
            "flags": ";".join(flags) if flags else None,
        })
        for t in ["detected_at", "ready_at", "analyzed_at"]:
            row[t] = iso(f[t + "_ms"])
            row[t + "_ms"] = f[t + "_ms"]
        for name in ["latency_ms", "attempts", "interruptions"]:
            row[name] = f[name]
        out.append(row)
    return out


def objects(run):
    out = []
    for f in db.execute("SELECT * FROM frames WHERE run_id = ? ORDER BY id", (run,)):
        for o in db.execute("SELECT * FROM objects WHERE frame_id = ? ORDER BY result, label", (f["id"],)):
            row = {"run": f["run_id"], "frame_id": f["id"], "file": f["file"]}
            row.update(position(f))
            row.update({
                "result": o["result"],
                "used": int(o["result"] == (f["count_source"] or "raw")),
                "label": o["label"],
                "area_px": o["area_px"],
                "area_um2": o["area_um2"],
                "centroid_x_px": o["centroid_x"],
                "centroid_y_px": o["centroid_y"],
            })
            for b in ["x_min", "y_min", "x_max", "y_max"]:
                row[f"bbox_{b}_px"] = o[f"bbox_{b}"]
            for name in ["mean_intensity", "integrated_intensity", "max_intensity", "perimeter_px",
                         "circularity", "major_axis_px", "minor_axis_px", "eccentricity",
                         "solidity", "channels"]:
                row[name] = o[name]
            out.append(row)
    return out


def alerts(run):
    out = []
    for a in db.execute("SELECT * FROM alerts WHERE run_id = ? ORDER BY id", (run,)):
        f = None
        if a["frame_id"] is not None:
            f = db.execute("SELECT * FROM frames WHERE id = ?", (a["frame_id"],)).fetchone()
        row = {"run": a["run_id"], "alert_id": a["id"], "condition": a["condition"],
               "opened_at": iso(a["opened_at_ms"]), "opened_at_ms": a["opened_at_ms"],
               "closed_at": iso(a["closed_at_ms"]), "closed_at_ms": a["closed_at_ms"],
               "frame_id": a["frame_id"],
               "file": a["file"] if a["file"] is not None else (f["file"] if f else None)}
        row.update(position(f) if f else {k: None for k in
                   ["well", "site", "time_point", "time_point_text", "channel"]})
        row.update({"message": a["message"], "closed_message": a["closed_message"],
                    "delivered_at": iso(a["delivered_at_ms"]), "delivered_at_ms": a["delivered_at_ms"]})
        out.append(row)
    return out


def flags(run):
    out = []
    for g in db.execute(
            "SELECT g.id AS flag_id, g.flag, g.value, g.limit_value, g.message, f.* "
            "FROM flags g, frames f WHERE f.id = g.frame_id AND f.run_id = ? ORDER BY g.id", (run,)):
        row = {"run": g["run_id"], "flag_id": g["flag_id"], "frame_id": g["id"], "file": g["file"]}
        row.update(position(g))
        row.update({"flag": g["flag"], "value": g["value"], "limit": g["limit_value"],
                    "message": g["message"]})
        out.append(row)
    return out


def missing(v):
    return v is None or (isinstance(v, float) and math.isnan(v)) or v is pd.NA


def same(got, want):
    if missing(want):
        return missing(got)
    if missing(got):
        return False
    if isinstance(want, float) or isinstance(got, float):
        return float(got) == float(want)  # exact: both sides are the stored double
    if isinstance(want, int):
        return int(got) == want
    return str(got) == want


failures = []


def compare(what, got_rows, got_columns, want):
    want_columns = list(want[0].keys()) if want else None
    if want_columns is not None and got_columns != want_columns:
        failures.append(f"{what}: columns {got_columns} != {want_columns}")
        return
    if len(got_rows) != len(want):
        failures.append(f"{what}: {len(got_rows)} rows, the database has {len(want)}")
        return
    for i, (g, w) in enumerate(zip(got_rows, want)):
        for k, v in w.items():
            if not same(g[k], v):
                failures.append(f"{what} row {i} column {k}: {g[k]!r} != {v!r}")


def read_csv(path, want):
    # Only an empty field is missing ("NA" or "null" would be text), text
    # columns kept as text (a time point "0003" stays so); pandas 3 parses
    # numbers exactly by default.
    text = {k for row in want for k, v in row.items() if isinstance(v, str)}
    df = pd.read_csv(path, keep_default_na=False, na_values=[""], dtype={k: str for k in text})
    return df.to_dict("records"), list(df.columns)


def main():
    last_run = db.execute("SELECT max(id) FROM runs").fetchone()[0]
    for name, expected in TABLES.items():
        want = expected(last_run)
        if not want:
            failures.append(f"{name}: the test database has no rows for it")
        compare(f"{name}.csv (pandas)", *read_csv(DIR / f"{name}.csv", want), want)
        table = pq.read_table(DIR / f"{name}.parquet")
        compare(f"{name}.parquet (pyarrow)", table.to_pylist(), table.column_names, want)
        df = pd.read_parquet(DIR / f"{name}.parquet")
        compare(f"{name}.parquet (pandas)", df.to_dict("records"), list(df.columns), want)
        # DuckDB reads the Parquet file on its own (its own reader, not pyarrow's).
        rel = duckdb.sql(f"SELECT * FROM read_parquet('{DIR / f'{name}.parquet'}')")
        compare(f"{name}.parquet (duckdb)", [dict(zip(rel.columns, r)) for r in rel.fetchall()], rel.columns, want)
        # Types a reader can rely on: integers, doubles, text.
        for field in table.schema:
            kinds = {type(r[field.name]) for r in want} - {type(None)}
            if kinds == {int} and field.type != pa.int64():
                failures.append(f"{name}.parquet {field.name}: {field.type}, expected int64")
            if kinds == {float} and field.type != pa.float64():
                failures.append(f"{name}.parquet {field.name}: {field.type}, expected double")
            if kinds == {str} and field.type != pa.string():
                failures.append(f"{name}.parquet {field.name}: {field.type}, expected string")
    compare("frames_run1.csv (pandas)", *read_csv(DIR / "frames_run1.csv", frames(1)), frames(1))
    finish("exports equal the database")


def finish(success):
    """Exits 1 listing every mismatch, else prints `success`."""
    if failures:
        print("\n".join(failures), file=sys.stderr)
        sys.exit(1)
    print(success)


TABLES = {"frames": frames, "objects": objects, "alerts": alerts, "flags": flags}

if __name__ == "__main__":
    main()
