"""Outside check of `framewarden reprocess`: reads the database with Python's
own sqlite3 (standard library) straight from its tables, not through
framewarden's views, and writes what the comparison must say.

usage: check_reprocess.py DIR   (reads DIR/fw.db and DIR/analysis.txt holding
the analysis number; writes DIR/expected.json)
"""
import json
import sqlite3
import sys
from collections import defaultdict
from pathlib import Path

folder = Path(sys.argv[1])
number = int((folder / "analysis.txt").read_text())
db = sqlite3.connect(f"file:{folder / 'fw.db'}?mode=ro", uri=True)
run_id, analysis_id = db.execute(
    "SELECT run_id, id FROM analyses WHERE number = ? ORDER BY run_id DESC LIMIT 1", (number,)
).fetchone()


def position(well, site, channel):
    parts = [well or ""]
    if site is not None:
        parts.append(f"site {site}")
    if channel is not None:
        parts.append(f"channel {channel}")
    return " ".join(p for p in parts if p).strip()


def flags(table, frame_id, extra=""):
    return {r[0] for r in db.execute(f"SELECT flag FROM {table} WHERE frame_id = ? {extra}", (frame_id,))}


per = defaultdict(lambda: {"frames": 0, "before": 0, "after": 0, "gained": defaultdict(int), "lost": defaultdict(int)})
not_reread = []
rows = db.execute(
    """SELECT f.id, f.file, f.well, f.site, f.channel, f.status,
              COALESCE(f.recount_object_count, f.object_count),
              a.status, COALESCE(a.recount_object_count, a.object_count), a.error
       FROM frames f JOIN analysis_frames a ON a.frame_id = f.id
       WHERE a.analysis_id = ? ORDER BY f.id""",
    (analysis_id,),
).fetchall()
for fid, file, well, site, channel, old_status, old_count, new_status, new_count, error in rows:
    p = per[position(well, site, channel)]
    if new_status != "done":
        not_reread.append([file, error])
        continue
    if old_status != "done":
        continue
    p["frames"] += 1
    p["before"] += old_count
    p["after"] += new_count
    old = flags("flags", fid)
    new = flags("analysis_flags", fid, f"AND analysis_id = {analysis_id}")
    for f in new - old:
        p["gained"][f] += 1
    for f in old - new:
        p["lost"][f] += 1

out = {
    "reread": sum(1 for r in rows if r[7] == "done"),
    "positions": {k: {"frames": v["frames"], "before": v["before"], "after": v["after"],
                      "gained": dict(v["gained"]), "lost": dict(v["lost"])} for k, v in per.items()},
    "not_reread": sorted(not_reread),
    "objects_after": db.execute(
        "SELECT count(*) FROM analysis_objects WHERE analysis_id = ?", (analysis_id,)).fetchone()[0],
}
(folder / "expected.json").write_text(json.dumps(out, indent=1, sort_keys=True))
