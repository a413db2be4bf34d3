//! Where the Python reference environment lives: one venv under Cargo's target
//! folder. The reference tests create and fill it (`super::reference_python`);
//! `benches/pipeline.rs` includes this file to find it, and only uses it.

use std::path::{Path, PathBuf};

/// Names an interpreter that already has the packages of
/// `tests/reference/requirements.txt`; when set, it is used instead of the venv.
pub const PYTHON_OVERRIDE: &str = "FRAMEWARDEN_PYTHON";

/// The interpreter [`PYTHON_OVERRIDE`] names, when it is set and not empty.
pub fn python_override() -> Option<PathBuf> {
    std::env::var_os(PYTHON_OVERRIDE)
        .filter(|p| !p.is_empty())
        .map(PathBuf::from)
}

/// `<target>/reference-venv`, where `<target>` is the `CARGO_TARGET_DIR` this
/// code was compiled under (a relative one taken from the folder of Cargo.toml),
/// else `target/` beside Cargo.toml. A target folder set only in Cargo's config
/// files is not visible here, so that case also falls back to `target/`.
pub fn venv_dir() -> PathBuf {
    let manifest = Path::new(env!("CARGO_MANIFEST_DIR"));
    let target = match option_env!("CARGO_TARGET_DIR") {
        // `join` keeps an absolute path as it is.
        Some(dir) if !dir.is_empty() => manifest.join(dir),
        _ => manifest.join("target"),
    };
    target.join("reference-venv")
}

/// The interpreter inside a venv.
pub fn venv_python(venv: &Path) -> PathBuf {
    if cfg!(windows) {
        venv.join("Scripts").join("python.exe")
    } else {
        venv.join("bin").join("python")
    }
}
