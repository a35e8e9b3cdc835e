//! Helpers shared by the integration tests that run the built `convchain` binary like a user would.
//!
//! Each test file includes this with `mod common;` and uses the helpers it needs.

// Every test crate compiles its own copy of this module and uses only some of it.
#![allow(dead_code)]

use std::ffi::OsStr;
use std::path::{Path, PathBuf};
use std::process::{Command, ExitStatus, Output, Stdio};
use std::time::{Duration, Instant};

/// A command for the built binary.
pub fn bin() -> Command {
    Command::new(env!("CARGO_BIN_EXE_convchain"))
}

/// Run the binary with `args` in the folder `dir` and wait for it.
pub fn run_in<S: AsRef<OsStr>>(dir: &Path, args: &[S]) -> Output {
    bin()
        .current_dir(dir)
        .args(args)
        .output()
        .expect("binary runs")
}

/// Run the binary with `args` in the test's own working folder (give absolute paths) and wait for it.
pub fn run<S: AsRef<OsStr>>(args: &[S]) -> Output {
    bin().args(args).output().expect("binary runs")
}

/// A path inside the crate's checkout (scenarios shipped with it, ...).
pub fn repo(path: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join(path)
}

/// Standard error of a finished run, as text.
pub fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).to_string()
}

/// Standard output of a finished run, as text.
pub fn stdout(o: &Output) -> String {
    String::from_utf8_lossy(&o.stdout).to_string()
}

/// Assert that a run succeeded; otherwise fail showing its status, standard output and standard error.
pub fn ok(o: &Output) {
    assert!(
        o.status.success(),
        "status {:?}\nstdout {}\nstderr {}",
        o.status,
        stdout(o),
        stderr(o)
    );
}

/// The bytes of `dir/f`, failing with the path when it cannot be read.
pub fn read(dir: &Path, f: &str) -> Vec<u8> {
    std::fs::read(dir.join(f)).unwrap_or_else(|e| panic!("{}: {e}", dir.join(f).display()))
}

/// A JSON file, parsed.
pub fn json(path: &Path) -> serde_json::Value {
    let text = std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

/// Start `cmd` (standard output discarded), send it SIGINT (what Ctrl-C sends) after `after`, and wait at
/// most 30 s for it to exit. Returns its exit status and what it wrote on standard error.
pub fn interrupt_after(cmd: &mut Command, after: Duration) -> (ExitStatus, String) {
    let mut child = cmd
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .expect("binary starts");
    std::thread::sleep(after);
    let st = Command::new("kill")
        .args(["-INT", &child.id().to_string()])
        .status()
        .expect("kill runs");
    assert!(st.success());
    let t0 = Instant::now();
    let status = loop {
        if let Some(s) = child.try_wait().unwrap() {
            break s;
        }
        assert!(
            t0.elapsed() < Duration::from_secs(30),
            "no exit after SIGINT"
        );
        std::thread::sleep(Duration::from_millis(50));
    };
    let mut err = String::new();
    std::io::Read::read_to_string(&mut child.stderr.take().unwrap(), &mut err).unwrap();
    (status, err)
}

/// A comma-separated file (no quoting, as convchain writes its rows) as its header and its rows of cells.
pub fn csv_rows(path: &Path) -> (Vec<String>, Vec<Vec<String>>) {
    let text = std::fs::read_to_string(path).unwrap();
    let mut lines = text.lines();
    let header: Vec<String> = lines
        .next()
        .unwrap()
        .split(',')
        .map(str::to_string)
        .collect();
    let rows = lines
        .map(|l| l.split(',').map(str::to_string).collect())
        .collect();
    (header, rows)
}
