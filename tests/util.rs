//! Helpers shared by the integration tests: locate the built binary and run it with a timeout.

use std::path::PathBuf;

/// Path of the `glint` binary cargo built for this workspace.
pub(crate) fn glint_bin() -> PathBuf {
    let mut p = std::env::current_exe().expect("test binary path");
    p.pop();
    if p.ends_with("deps") {
        p.pop();
    }
    p.join("glint")
}
