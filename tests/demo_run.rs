//! `plumbline demo` from a clean directory: it must end with the summary
//! and exit 0, and everything it says it wrote must be there.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::process::Command;

#[test]
fn demo_runs_end_to_end_and_tells_where_things_are() {
    let dir = tempfile::tempdir().expect("tempdir");
    let out = Command::new(env!("CARGO_BIN_EXE_plumbline"))
        .args(["demo", "--dir"])
        .arg(dir.path())
        .output()
        .expect("demo runs");
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "demo failed: {}\n{stdout}",
        String::from_utf8_lossy(&out.stderr)
    );
    for section in [
        "1. fit on 320 compounds",
        "2. scored the next round through gRPC",
        "top ranked",
        "3. lab results",
        "files",
    ] {
        assert!(
            stdout.contains(section),
            "missing '{section}' in:\n{stdout}"
        );
    }
    // The new series is refused, never ranked (the scenario's point).
    assert!(stdout.contains("refused"), "{stdout}");
    for f in [
        "bundles/demo-activity.plumb",
        "report/report.html",
        "report/report.json",
        "audit/audit.db",
    ] {
        assert!(dir.path().join(f).exists(), "{f} was not written");
    }
    assert!(stdout.contains("not safety, dosing or regulatory decisions"));
}
