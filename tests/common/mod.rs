//! Shared by the reference tests: the Python interpreter they run (a venv under
//! the target folder, created by the first test that needs it, or the one
//! `FRAMEWARDEN_PYTHON` names), running a script of `tests/reference/` that
//! writes real image files and the outside libraries' answers into a folder,
//! and reporting every mismatch of a check at once.

mod venv;

use std::fs::{self, OpenOptions, TryLockError};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::OnceLock;
use std::time::Instant;

/// Written into the venv, last, with the text of requirements.txt it was
/// filled from: a venv without it (a failed install) or with other text (the
/// requirements changed) is built again.
const MARKER: &str = "framewarden-requirements.txt";

/// The interpreter for the reference scripts: the one `FRAMEWARDEN_PYTHON`
/// names, else `<target>/reference-venv`, created with `python3 -m venv` and
/// filled with the venv's pip from `tests/reference/requirements.txt` the first
/// time it is needed (and again whenever requirements.txt changes). Tests on
/// other threads wait for the first one; other processes wait on a file lock
/// beside the venv. A finished venv is reused without calling pip.
///
/// # Panics
/// When the venv cannot be created or its packages cannot be installed, with
/// the cause, pip's output and what to do: the tests fail, never skip.
pub fn reference_python() -> PathBuf {
    if let Some(python) = venv::python_override() {
        return python;
    }
    static VENV_PYTHON: OnceLock<Result<PathBuf, String>> = OnceLock::new();
    match VENV_PYTHON.get_or_init(|| ensure_venv(&venv::venv_dir())) {
        Ok(python) => python.clone(),
        Err(e) => panic!("{e}"),
    }
}

/// Makes `venv` match requirements.txt, holding `<venv>.lock` while it looks
/// and builds, and returns its interpreter.
fn ensure_venv(venv: &Path) -> Result<PathBuf, String> {
    let requirements_path =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/requirements.txt");
    let requirements = fs::read_to_string(&requirements_path)
        .map_err(|e| format!("cannot read {}: {e}", requirements_path.display()))?;
    let lock_path = venv.with_extension("lock");
    if let Some(parent) = lock_path.parent() {
        fs::create_dir_all(parent)
            .map_err(|e| format!("cannot create {}: {e}", parent.display()))?;
    }
    let lock = OpenOptions::new()
        .create(true)
        .truncate(false)
        .write(true)
        .open(&lock_path)
        .map_err(|e| format!("cannot open the lock file {}: {e}", lock_path.display()))?;
    match lock.try_lock() {
        Ok(()) => {}
        Err(TryLockError::WouldBlock) => {
            say(&format!(
                "waiting for {}: another test process is setting up the Python reference venv",
                lock_path.display()
            ));
            lock.lock()
                .map_err(|e| format!("cannot lock {}: {e}", lock_path.display()))?;
        }
        Err(TryLockError::Error(e)) => {
            return Err(format!("cannot lock {}: {e}", lock_path.display()))
        }
    }

    let python = venv::venv_python(venv);
    let marker = venv.join(MARKER);
    if python.exists() && fs::read_to_string(&marker).is_ok_and(|done| done == requirements) {
        return Ok(python);
    }
    build_venv(venv, &python, &requirements_path)?;
    fs::write(&marker, &requirements)
        .map_err(|e| format!("cannot write {}: {e}", marker.display()))?;
    // `lock` is released when it is dropped, on every return.
    Ok(python)
}

/// Replaces whatever is at `venv` with a new venv holding the packages of
/// `requirements_path`.
fn build_venv(venv: &Path, python: &Path, requirements_path: &Path) -> Result<(), String> {
    let started = Instant::now();
    say(&format!(
        "creating the Python reference venv {} from {} (once; pip needs PyPI) ...",
        venv.display(),
        requirements_path.display()
    ));
    if venv.exists() {
        fs::remove_dir_all(venv)
            .map_err(|e| format!("cannot remove the outdated venv {}: {e}", venv.display()))?;
    }
    let hint = format!(
        "The reference tests build this venv themselves and need Python 3 (`python3` on PATH, \
         with its venv module; on Debian/Ubuntu: apt install python3-venv) and, once, network \
         access to PyPI (pip's own configuration, e.g. PIP_INDEX_URL, is honoured). Fix the \
         cause and run the tests again; or set {} to an interpreter that already has the \
         packages of {}.",
        venv::PYTHON_OVERRIDE,
        requirements_path.display()
    );
    let created = Command::new("python3")
        .arg("-m")
        .arg("venv")
        .arg(venv)
        .output();
    check_step(
        created,
        &format!("python3 -m venv {}", venv.display()),
        &hint,
    )?;
    let installed = Command::new(python)
        .args([
            "-m",
            "pip",
            "install",
            "--disable-pip-version-check",
            "--no-input",
            "-r",
        ])
        .arg(requirements_path)
        .output();
    check_step(
        installed,
        &format!(
            "{} -m pip install -r {}",
            python.display(),
            requirements_path.display()
        ),
        &hint,
    )?;
    say(&format!(
        "created the Python reference venv {} in {:.0} s",
        venv.display(),
        started.elapsed().as_secs_f64()
    ));
    Ok(())
}

/// `Ok` when the step ran and succeeded; else what failed, its output and `hint`.
fn check_step(result: std::io::Result<Output>, step: &str, hint: &str) -> Result<(), String> {
    match result {
        Err(e) => Err(format!("cannot run `{step}`: {e}\n{hint}")),
        Ok(out) if out.status.success() => Ok(()),
        Ok(out) => Err(format!(
            "`{step}` failed ({}):\n--- stdout ---\n{}\n--- stderr ---\n{}\n{hint}",
            out.status,
            String::from_utf8_lossy(&out.stdout).trim_end(),
            String::from_utf8_lossy(&out.stderr).trim_end()
        )),
    }
}

/// Progress for the person waiting: written to stderr directly, past the test
/// harness's capture, because creating the venv takes minutes.
fn say(line: &str) {
    let _ = writeln!(std::io::stderr(), "framewarden tests: {line}");
}

/// Runs `tests/reference/<script> <out>` with [`reference_python`]; panics with
/// the script's stderr and a hint when it fails (the tests fail, never skip).
pub fn run_reference_script(script: &str, out: &Path) {
    let script = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/reference")
        .join(script);
    let python = reference_python();
    let hint = if venv::python_override().is_some() {
        format!(
            "{} names {}: it needs the packages pinned in tests/reference/requirements.txt \
             (unset {} to let the tests build their own venv)",
            venv::PYTHON_OVERRIDE,
            python.display(),
            venv::PYTHON_OVERRIDE
        )
    } else {
        format!(
            "{} is the tests' own venv; delete {} to have the next test run build it again",
            python.display(),
            venv::venv_dir().display()
        )
    };
    let output = Command::new(&python)
        .arg(&script)
        .arg(out)
        .output()
        .unwrap_or_else(|e| panic!("cannot run {} ({e}): {hint}", python.display()));
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
