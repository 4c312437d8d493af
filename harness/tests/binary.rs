//! The `assay` binary starts and answers. Having an integration test in this package also makes
//! `cargo test --workspace` build the binary, which the end-to-end tests in `tests/` drive.

use std::process::Command;

#[test]
fn binary_prints_its_version_and_rejects_unknown_commands() {
    let bin = env!("CARGO_BIN_EXE_assay");
    let v = Command::new(bin).arg("--version").output().unwrap();
    assert!(v.status.success());
    assert!(String::from_utf8_lossy(&v.stdout).starts_with("assay "));
    // clap's usage errors exit with code 2, like every unusable input.
    let bad = Command::new(bin).arg("frobnicate").output().unwrap();
    assert_eq!(bad.status.code(), Some(2));
}
