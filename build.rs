//! Compiles the gRPC contract under `proto/` without a system `protoc`:
//! `protox` (pure Rust) parses the files into a descriptor set, and
//! `tonic-prost-build` generates the messages and services from it.

use std::{env, fs, path::PathBuf};

use prost::Message as _;

const PROTO_ROOT: &str = "proto";

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let protos = proto_files(PROTO_ROOT)?;
    for p in &protos {
        println!("cargo:rerun-if-changed={p}");
    }
    println!("cargo:rerun-if-changed={PROTO_ROOT}");

    let descriptors = protox::compile(&protos, [PROTO_ROOT])?;
    let out_dir = PathBuf::from(env::var("OUT_DIR")?);
    let descriptor_path = out_dir.join("plumbline_descriptor.bin");
    fs::write(&descriptor_path, descriptors.encode_to_vec())?;

    tonic_prost_build::configure()
        .file_descriptor_set_path(&descriptor_path)
        // Hand-written for a faster decode of its descriptors; see there.
        .extern_path(".plumbline.v1.Candidate", "crate::pb::Candidate")
        .skip_protoc_run()
        .compile_protos(&protos, &[PROTO_ROOT.to_string()])?;
    Ok(())
}

/// Every `.proto` below `root`, sorted so the build is reproducible.
fn proto_files(root: &str) -> std::io::Result<Vec<String>> {
    let mut found = Vec::new();
    let mut stack = vec![PathBuf::from(root)];
    while let Some(dir) = stack.pop() {
        for entry in fs::read_dir(&dir)? {
            let path = entry?.path();
            if path.is_dir() {
                stack.push(path);
            } else if path.extension().is_some_and(|e| e == "proto") {
                found.push(path.to_string_lossy().into_owned());
            }
        }
    }
    found.sort();
    Ok(found)
}
