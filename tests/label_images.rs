//! Label images from the watch service: the real binary on a temp folder,
//! the real database, and the images read back by an outside library
//! (tifffile, with the pixel counts and centroids computed by numpy in
//! `tests/reference/read_label_images.py`).
//!
//! Each image is checked against the objects rows of its frame: every label
//! in the image is an object of the result whose count is used (`result =
//! 'recount'` where the uneven-illumination remedy ran, else `'raw'`; the same
//! labels `analyze --labels` writes), with `area_px` pixels and its centroid,
//! and every such object is in the image.

mod common;
#[allow(dead_code)]
mod watch_support;

use std::collections::BTreeMap;
use std::path::Path;
use std::time::Duration;

use framewarden::store::label_image_path;
use framewarden::synth::{self, SceneSpec};
use rusqlite::{Connection, OpenFlags};
use serde::Deserialize;
use watch_support::Bench;

const LONG: Duration = Duration::from_secs(120);

/// A 128 × 128 frame with `objects` objects across a background that changes
/// by `gradient` across the field.
fn frame_bytes(seed: u64, objects: usize, gradient: f64) -> Vec<u8> {
    let spec = SceneSpec {
        width: 128,
        height: 128,
        object_count: objects,
        radius_px: (4.0, 7.0),
        gradient,
        object_level: if gradient > 0.0 { 0.25 } else { 0.5 },
        seed,
        ..SceneSpec::default()
    };
    let scene = synth::generate(&spec).expect("a scene that fits");
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("f.tif");
    synth::write_tiff(&path, &scene.frame).unwrap();
    std::fs::read(&path).unwrap()
}

/// One recorded frame: its row id, whether it got a flag, where its count
/// came from, the first result's count, and the objects of the result whose
/// count is used (label → area, centroid x, y).
#[derive(Debug)]
struct Frame {
    id: i64,
    file: String,
    flagged: bool,
    count_source: Option<String>,
    raw_count: i64,
    objects: BTreeMap<i64, (i64, f64, f64)>,
}

fn frames(db: &Path) -> Vec<Frame> {
    let conn = Connection::open_with_flags(db, OpenFlags::SQLITE_OPEN_READ_ONLY).unwrap();
    let mut frames: Vec<Frame> = conn
        .prepare(
            "SELECT id, file, EXISTS (SELECT 1 FROM flags WHERE frame_id = frames.id), count_source,
                    object_count
               FROM frames WHERE status = 'done' ORDER BY id",
        )
        .unwrap()
        .query_map([], |r| {
            Ok(Frame {
                id: r.get(0)?,
                file: r.get(1)?,
                flagged: r.get(2)?,
                count_source: r.get(3)?,
                raw_count: r.get(4)?,
                objects: BTreeMap::new(),
            })
        })
        .unwrap()
        .collect::<Result<_, _>>()
        .unwrap();
    for f in &mut frames {
        f.objects = conn
            .prepare(
                "SELECT label, area_px, centroid_x, centroid_y FROM objects
                  WHERE frame_id = ?1 AND result = ?2",
            )
            .unwrap()
            .query_map((f.id, f.count_source.as_deref().unwrap_or("raw")), |r| {
                Ok((r.get(0)?, (r.get(1)?, r.get(2)?, r.get(3)?)))
            })
            .unwrap()
            .collect::<Result<_, _>>()
            .unwrap();
    }
    frames
}

/// What tifffile and numpy read from one label image.
#[derive(Debug, Deserialize)]
struct ReadBack {
    dtype: String,
    compression: u32,
    shape: Vec<usize>,
    labels: BTreeMap<i64, (i64, f64, f64)>,
}

/// Every label image in the bench's folder, read by the reference script,
/// by its path relative to the bench folder.
fn read_back(bench: &Bench) -> BTreeMap<String, ReadBack> {
    common::run_reference_script("read_label_images.py", bench.dir.path());
    let text = std::fs::read_to_string(bench.dir.path().join("label_images.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

/// The image of `frame` matches its objects rows exactly.
fn image_matches(frame: &Frame, image: &ReadBack, failures: &mut Vec<String>) {
    let name = format!("frame {} ({})", frame.id, frame.file);
    // LZW is compression 5 (TIFF 6.0); 16 bits while labels fit.
    if (
        image.dtype.as_str(),
        image.compression,
        image.shape.as_slice(),
    ) != ("uint16", 5, [128, 128].as_slice())
    {
        failures.push(format!(
            "{name}: {} {} {:?}",
            image.dtype, image.compression, image.shape
        ));
    }
    let labels: Vec<&i64> = image.labels.keys().collect();
    let objects: Vec<&i64> = frame.objects.keys().collect();
    if labels != objects {
        failures.push(format!("{name}: labels {labels:?}, objects {objects:?}"));
    }
    for (label, &(area, x, y)) in &frame.objects {
        let Some(&(pixels, cx, cy)) = image.labels.get(label) else {
            continue;
        };
        // Both centroids are means of the same integer coordinates.
        if pixels != area || (cx - x).abs() > 1e-9 || (cy - y).abs() > 1e-9 {
            failures.push(format!(
                "{name} label {label}: image {pixels} px at ({cx}, {cy}), row {area} px at ({x}, {y})"
            ));
        }
    }
}

#[test]
fn by_default_flagged_frames_get_an_image_that_matches_their_objects() {
    // Sparse frames are flagged for a small foreground, dense ones are not;
    // the unevenly lit one is flagged and recounted. No `label_images` key:
    // "flagged" is the default.
    let mut bench = Bench::with_config(
        "",
        "[quality]\nmin_foreground_fraction = 0.05\nmax_count_jump = 1000.0\n\
         on_uneven_illumination = \"flatten\"\n",
    );
    bench.start();
    for i in 0..3u64 {
        bench.write(&format!("sparse-{i}.tif"), &frame_bytes(10 + i, 3, 0.0));
        bench.write(&format!("dense-{i}.tif"), &frame_bytes(20 + i, 20, 0.0));
    }
    bench.write("uneven.tif", &frame_bytes(30, 12, 0.9));
    bench.wait_finished(7, LONG);
    // Images are written after their rows commit; a clean stop writes them all.
    bench.stop();

    let frames = frames(&bench.db);
    assert_eq!(frames.len(), 7);
    let flagged: Vec<&str> = frames
        .iter()
        .filter(|f| f.flagged)
        .map(|f| f.file.as_str())
        .collect();
    assert!(
        flagged.len() == 4 && flagged.iter().all(|f| !f.contains("dense")),
        "the sparse frames and the uneven one are flagged: {flagged:?}"
    );
    let recounted = frames
        .iter()
        .find(|f| f.count_source.as_deref() == Some("recount"))
        .expect("the unevenly lit frame is recounted");
    assert!(recounted.file.ends_with("uneven.tif") && recounted.flagged);
    // The recount found other objects, so the image tells the two apart.
    assert_ne!(
        recounted.objects.len() as i64,
        recounted.raw_count,
        "the recount changes the count"
    );

    let images = read_back(&bench);
    let mut failures = Vec::new();
    for f in &frames {
        let path = label_image_path(&bench.db, f.id);
        let key = format!("fw-labels/frame-{}.tif", f.id);
        assert_eq!(
            path,
            bench.dir.path().canonicalize().unwrap().join(&key),
            "the image is named by the frame's row id, beside the database"
        );
        match (f.flagged, images.get(&key)) {
            (true, Some(image)) => image_matches(f, image, &mut failures),
            (true, None) => failures.push(format!("{}: flagged, no image", f.file)),
            (false, Some(_)) => failures.push(format!("{}: not flagged, has an image", f.file)),
            (false, None) => assert!(!path.exists()),
        }
    }
    common::check(failures, "label images against the objects rows");
    // The folder holds the images and nothing else.
    let folder = bench.dir.path().join("fw-labels");
    assert_eq!(std::fs::read_dir(folder).unwrap().count(), 4);
}

#[test]
fn all_writes_one_image_per_frame_and_none_writes_no_folder() {
    let mut all = Bench::with_config("", "label_images = \"all\"\n");
    let mut none = Bench::with_config("", "label_images = \"none\"\n");
    for bench in [&mut all, &mut none] {
        bench.start();
        for i in 0..3u64 {
            bench.write(
                &format!("A0{i}.tif"),
                &frame_bytes(40 + i, 4 + 4 * i as usize, 0.0),
            );
        }
        bench.wait_finished(3, LONG);
        bench.stop();
    }
    assert!(!none.dir.path().join("fw-labels").exists());

    let frames = frames(&all.db);
    let images = read_back(&all);
    assert_eq!(images.len(), 3, "{:?}", images.keys());
    let mut failures = Vec::new();
    for f in &frames {
        match images.get(&format!("fw-labels/frame-{}.tif", f.id)) {
            Some(image) => image_matches(f, image, &mut failures),
            None => failures.push(format!("{}: no image", f.file)),
        }
    }
    common::check(failures, "label images against the objects rows");
}

#[test]
fn an_image_that_cannot_be_written_is_logged_and_the_service_goes_on() {
    let mut bench = Bench::with_config("", "label_images = \"all\"\n");
    // A file where the folder should be: no image can be written.
    std::fs::write(bench.dir.path().join("fw-labels"), b"in the way").unwrap();
    bench.start();
    bench.write("B01.tif", &frame_bytes(50, 5, 0.0));
    bench.wait_finished(1, LONG);
    bench.write("B02.tif", &frame_bytes(51, 5, 0.0));
    let rows = bench.wait_finished(2, LONG);
    assert!(rows.iter().all(|r| r.status == "done"), "{rows:?}");
    bench.stop();
    let logs = bench.logs();
    for name in ["B01.tif", "B02.tif"] {
        assert!(
            logs.lines()
                .any(|l| l.contains(name) && l.contains("not written") && l.contains("fw-labels")),
            "{name}: the log names the frame, the label image and the cause:\n{logs}"
        );
    }
}

#[test]
fn a_crash_and_restart_duplicate_no_row_and_leave_only_whole_images() {
    let mut bench = Bench::with_config("", "label_images = \"all\"\n");
    bench.start();
    for i in 0..6u64 {
        bench.write(&format!("C{i:02}.tif"), &frame_bytes(60 + i, 8, 0.0));
    }
    watch_support::wait_for("some frames to be recorded", LONG, || {
        bench.rows().iter().any(|r| r.status == "done")
    });
    bench.kill_hard();
    // What an image write cut short by the crash would leave.
    let folder = bench.dir.path().join("fw-labels");
    std::fs::create_dir_all(&folder).unwrap();
    let partial = folder.join("frame-999.tif.partial");
    std::fs::write(&partial, b"cut short").unwrap();
    bench.start();
    for i in 6..12u64 {
        bench.write(&format!("C{i:02}.tif"), &frame_bytes(60 + i, 8, 0.0));
    }
    let rows = bench.wait_finished(12, LONG);
    bench.stop();

    let mut names: Vec<&str> = rows.iter().map(|r| r.path.as_str()).collect();
    names.sort_unstable();
    names.dedup();
    assert_eq!(names.len(), 12, "a file recorded twice: {rows:?}");
    assert!(rows.iter().all(|r| r.status == "done"), "{rows:?}");
    assert!(!partial.exists(), "the restart removes what a crash left");
    // A frame committed just before the kill may have no image; every image
    // there is whole, belongs to a row and matches it, and every frame after
    // the restart has one.
    let frames = frames(&bench.db);
    let images = read_back(&bench);
    let mut failures = Vec::new();
    for f in &frames {
        let after_restart = f.file.as_str() >= bench.acq.join("C06.tif").to_str().unwrap();
        match images.get(&format!("fw-labels/frame-{}.tif", f.id)) {
            Some(image) => image_matches(f, image, &mut failures),
            None if after_restart => failures.push(format!("{}: no image", f.file)),
            None => {}
        }
    }
    assert!(
        images.keys().all(|k| frames
            .iter()
            .any(|f| *k == format!("fw-labels/frame-{}.tif", f.id))),
        "an image without a row: {:?}",
        images.keys()
    );
    common::check(failures, "label images after a crash");
}
