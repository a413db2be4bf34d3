//! The `analyze` command as a user runs it: the real binary on real files.
//! JSON lines carry the documented fields, a bad file gives an error line and
//! exit code 1 while the others still run, and usage/config errors exit 2.

use std::path::Path;
use std::process::Command;

use framewarden::synth::{generate, write_tiff, SceneSpec};

fn binary() -> Command {
    Command::new(env!("CARGO_BIN_EXE_framewarden"))
}

fn scene(dir: &Path, name: &str, objects: usize, seed: u64) -> std::path::PathBuf {
    let spec = SceneSpec {
        width: 160,
        height: 120,
        object_count: objects,
        seed,
        ..SceneSpec::default()
    };
    let scene = generate(&spec).expect("scene fits");
    let path = dir.join(name);
    write_tiff(&path, &scene.frame).unwrap();
    path
}

#[test]
fn json_lines_have_the_documented_fields_and_errors_do_not_stop_the_run() {
    let dir = tempfile::tempdir().unwrap();
    let sub = dir.path().join("plate");
    std::fs::create_dir(&sub).unwrap();
    scene(&sub, "a_01.tif", 7, 1);
    scene(&sub, "b_02.tif", 3, 2);
    std::fs::write(sub.join("c_03.tif"), b"II*\0not really").unwrap();
    std::fs::write(sub.join("notes.txt"), b"ignored: not an image name").unwrap();
    let out = binary()
        .args(["analyze", "--json"])
        .arg(&sub)
        .output()
        .unwrap();
    assert_eq!(
        out.status.code(),
        Some(1),
        "one file failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let lines: Vec<serde_json::Value> = String::from_utf8(out.stdout)
        .unwrap()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(lines.len(), 3, "one line per image file, in sorted order");
    for key in [
        "file",
        "width",
        "height",
        "bit_depth",
        "threshold",
        "separability",
        "object_count",
        "foreground_fraction",
        "background_level",
        "saturation_fraction",
        "focus",
        "illumination_change",
        "objects",
    ] {
        assert!(lines[0].get(key).is_some(), "missing {key}");
    }
    for key in [
        "label",
        "area_px",
        "centroid_x",
        "centroid_y",
        "bbox",
        "mean_intensity",
        "integrated_intensity",
        "max_intensity",
        "perimeter_px",
        "circularity",
        "major_axis_px",
        "minor_axis_px",
        "eccentricity",
    ] {
        assert!(
            lines[0]["objects"][0].get(key).is_some(),
            "missing object field {key}"
        );
    }
    // Ground truth from the generator: 7 and 3 objects.
    assert_eq!(lines[0]["object_count"], 7);
    assert_eq!(lines[1]["object_count"], 3);
    assert!(lines[2]["file"].as_str().unwrap().ends_with("c_03.tif"));
    assert!(
        lines[2]["error"].as_str().unwrap().contains("c_03.tif"),
        "{}",
        lines[2]
    );
}

#[test]
fn table_output_and_success_exit_code() {
    let dir = tempfile::tempdir().unwrap();
    let f = scene(dir.path(), "one.tif", 4, 3);
    let out = binary().arg("analyze").arg(&f).output().unwrap();
    assert!(out.status.success());
    let text = String::from_utf8(out.stdout).unwrap();
    assert!(text.starts_with("file"), "{text}");
    assert!(text.lines().nth(1).unwrap().contains("one.tif"), "{text}");
}

#[test]
fn usage_and_config_errors_exit_2() {
    let dir = tempfile::tempdir().unwrap();
    let f = scene(dir.path(), "one.tif", 2, 4);
    assert_eq!(
        binary().arg("analyze").output().unwrap().status.code(),
        Some(2),
        "no paths"
    );
    assert_eq!(
        binary()
            .args(["analyze", "/no/such/path"])
            .output()
            .unwrap()
            .status
            .code(),
        Some(2)
    );
    let conf = dir.path().join("bad.toml");
    std::fs::write(&conf, "[segment]\nmethod = \"otsu\"\ncolour = 3\n").unwrap();
    let out = binary()
        .arg("analyze")
        .arg("--config")
        .arg(&conf)
        .arg(&f)
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8(out.stderr).unwrap();
    assert!(
        err.contains("bad.toml:3:") && err.contains("colour"),
        "{err}"
    );
}

#[test]
fn config_settings_change_the_analysis() {
    let dir = tempfile::tempdir().unwrap();
    let f = scene(dir.path(), "one.tif", 5, 5);
    let conf = dir.path().join("fixed.toml");
    // A fixed level above every pixel: no objects.
    std::fs::write(
        &conf,
        "[segment]\nmethod = \"fixed\"\nfixed_level = 65535\n",
    )
    .unwrap();
    let out = binary()
        .args(["analyze", "--json", "--config"])
        .arg(&conf)
        .arg(&f)
        .output()
        .unwrap();
    assert!(out.status.success());
    let line: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(
        (line["method"].as_str(), line["object_count"].as_u64()),
        (Some("fixed"), Some(0))
    );
}

#[test]
fn frames_carry_the_flags_they_earn_on_their_own() {
    let dir = tempfile::tempdir().unwrap();
    let cells = scene(dir.path(), "a_cells.tif", 6, 7);
    // Pure noise: no objects to find, a unimodal histogram.
    let spec = SceneSpec {
        width: 160,
        height: 120,
        object_count: 0,
        noise_sigma: 0.02,
        seed: 8,
        ..SceneSpec::default()
    };
    let noise = dir.path().join("b_noise.tif");
    write_tiff(&noise, &generate(&spec).unwrap().frame).unwrap();
    let out = binary()
        .args(["analyze", "--json"])
        .arg(&cells)
        .arg(&noise)
        .output()
        .unwrap();
    assert!(out.status.success());
    let lines: Vec<serde_json::Value> = String::from_utf8(out.stdout)
        .unwrap()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(
        lines[0]["flags"],
        serde_json::json!([]),
        "{}",
        lines[0]["flags"]
    );
    let flags = lines[1]["flags"].as_array().unwrap();
    let unimodal = flags
        .iter()
        .find(|f| f["flag"] == "unimodal_histogram")
        .expect("noise is flagged");
    assert!(unimodal["value"].as_f64().unwrap() < unimodal["limit"].as_f64().unwrap());
    assert!(unimodal["message"].as_str().unwrap().contains("unimodal"));
}

#[test]
fn a_recount_after_flattening_is_reported_beside_the_first_result() {
    // Dim objects on a background that doubles across the field (the scene of
    // the remedy's unit test): flagged uneven, so segmented again flattened.
    let dir = tempfile::tempdir().unwrap();
    let spec = SceneSpec {
        width: 256,
        height: 256,
        object_count: 20,
        radius_px: (4.0, 7.0),
        object_level: 0.25,
        gradient: 0.9,
        ..SceneSpec::default()
    };
    let frame = dir.path().join("uneven.tif");
    write_tiff(&frame, &generate(&spec).unwrap().frame).unwrap();
    let even = scene(dir.path(), "even.tif", 6, 7);
    let config = dir.path().join("fw.toml");
    std::fs::write(
        &config,
        // Every component counts: the remedy, not the size filter, must fix it.
        "[segment]\nmin_area_px = 0\n[quality]\non_uneven_illumination = \"flatten\"\nflatten_radius_px = 30.0\n",
    )
    .unwrap();
    let run = |json: bool| {
        let mut cmd = binary();
        cmd.args(["analyze", "--config"]).arg(&config);
        if json {
            cmd.arg("--json");
        }
        let out = cmd.arg(&frame).arg(&even).output().unwrap();
        assert!(out.status.success(), "{out:?}");
        String::from_utf8(out.stdout).unwrap()
    };
    let lines: Vec<serde_json::Value> = run(true)
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    let second = &lines[0]["recount"];
    let recount = second["object_count"].as_u64().expect("a recount");
    assert_eq!(second["objects"].as_array().unwrap().len() as u64, recount);
    let first = lines[0]["object_count"].as_u64().unwrap();
    assert!(
        recount.abs_diff(20) < first.abs_diff(20),
        "recount {recount}, first {first}, truth 20"
    );
    let sentence = lines[0]["flags"]
        .as_array()
        .unwrap()
        .iter()
        .find(|f| f["flag"] == "uneven_illumination")
        .unwrap()["message"]
        .as_str()
        .unwrap()
        .to_string();
    assert!(
        sentence.contains(&format!("{recount} objects"))
            && sentence.contains("the count is taken from the recount"),
        "{sentence}"
    );
    // An evenly lit frame is analyzed once.
    assert!(lines[1]["recount"].is_null(), "{}", lines[1]);
    // The table shows the count used, marked.
    let table = run(false);
    let row = table.lines().nth(1).unwrap();
    assert!(row.contains(&format!(" {recount}* ")), "{table}");
}

#[test]
fn label_images_are_written_and_match_the_objects() {
    let dir = tempfile::tempdir().unwrap();
    let a = scene(dir.path(), "A01_t0001_nuclei.tif", 9, 21);
    // Two inputs with one stem (in different folders) get distinct images.
    std::fs::create_dir(dir.path().join("again")).unwrap();
    let b = scene(&dir.path().join("again"), "A01_t0001_nuclei.tif", 5, 22);
    let labels = dir.path().join("labels");
    let out = binary()
        .args(["analyze", "--json", "--labels"])
        .arg(&labels)
        .arg(&a)
        .arg(&b)
        .output()
        .unwrap();
    assert!(out.status.success(), "{out:?}");
    let lines: Vec<serde_json::Value> = String::from_utf8(out.stdout)
        .unwrap()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    let names: Vec<&str> = lines
        .iter()
        .map(|l| l["labels"].as_str().unwrap())
        .collect();
    assert!(
        names[0].ends_with("labels/A01_t0001_nuclei.labels.tif"),
        "{names:?}"
    );
    assert!(
        names[1].ends_with("labels/A01_t0001_nuclei-2.labels.tif"),
        "{names:?}"
    );
    for line in &lines {
        // Read back with our own decoder (16-bit, LZW): each label's pixel
        // count is its object's area, and the background is 0.
        let image = framewarden::decode::read_page(
            Path::new(line["labels"].as_str().unwrap()),
            0,
            &framewarden::decode::DecodeLimits::default(),
        )
        .unwrap();
        let objects = line["objects"].as_array().unwrap();
        assert!(!objects.is_empty());
        let mut area = vec![0u64; objects.len() + 1];
        for &v in &image.pixels {
            area[usize::from(v)] += 1;
        }
        for o in objects {
            let label = o["label"].as_u64().unwrap() as usize;
            assert_eq!(area[label], o["area_px"].as_u64().unwrap(), "label {label}");
        }
        let kept: u64 = area[1..].iter().sum();
        let fraction = line["foreground_fraction"].as_f64().unwrap();
        assert!((kept as f64 / image.len() as f64 - fraction).abs() < 1e-12);
    }
}

#[test]
fn control_characters_in_file_names_are_escaped_in_the_table() {
    let dir = tempfile::tempdir().unwrap();
    // A newline and a terminal escape sequence (red text) in the name.
    let hostile = scene(dir.path(), "A01\n\u{1b}[31mred.tif", 4, 5);
    let out = binary().arg("analyze").arg(&hostile).output().unwrap();
    assert!(out.status.success(), "{out:?}");
    let stdout = String::from_utf8(out.stdout).unwrap();
    // The header and one line: the newline did not split the frame's line,
    // and no escape character reached the output.
    assert_eq!(stdout.lines().count(), 2, "{stdout}");
    assert!(!stdout.contains('\u{1b}'), "{stdout:?}");
    assert!(stdout.contains("A01\\n\\u{1b}[31mred.tif"), "{stdout}");
}
