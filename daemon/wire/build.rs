//! Compiles proto/glint/v1/*.proto into Rust with prost-build, parsing the schema with the pure-Rust protox
//! so no system protoc is needed.

use std::path::PathBuf;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../../proto");
    let files = [
        root.join("glint/v1/ingest.proto"),
        root.join("glint/v1/alert.proto"),
    ];
    for f in &files {
        println!("cargo:rerun-if-changed={}", f.display());
    }
    let fds = protox::compile(&files, [&root])?;
    prost_build::Config::new().compile_fds(fds)?;
    Ok(())
}
