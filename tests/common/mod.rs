//! Shared by the reference tests: running a script of `tests/reference/` that
//! writes real image files and the outside libraries' answers into a folder.

use std::path::{Path, PathBuf};
use std::process::Command;

/// Runs `python3 tests/reference/<script> <out>`; panics with an install hint
/// when Python or a pinned package is missing (the tests fail, never skip).
pub fn run_reference_script(script: &str, out: &Path) {
    let script = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/reference")
        .join(script);
    let hint = "the reference tests need python3 with the packages pinned in \
                tests/reference/requirements.txt (python3 -m pip install -r \
                tests/reference/requirements.txt)";
    let output = Command::new("python3")
        .arg(&script)
        .arg(out)
        .output()
        .unwrap_or_else(|e| panic!("cannot run python3 ({e}): {hint}"));
    assert!(
        output.status.success(),
        "{} failed ({}):\n{}\n{hint}",
        script.display(),
        output.status,
        String::from_utf8_lossy(&output.stderr)
    );
}

/// Fails with every mismatch listed, after a check has looked at all cases.
pub fn check(failures: Vec<String>, what: &str) {
    assert!(
        failures.is_empty(),
        "{what}: {} mismatch(es)\n{}",
        failures.len(),
        failures.join("\n")
    );
}
