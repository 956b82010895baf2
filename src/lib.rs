//! plumbline: honest regression model building and a gRPC scoring service
//! with an applicability-domain guard.
//!
//! # Layout
//! The core (`space`, `models`, `validate`, `conformal`, `domain`) is pure
//! numerics on `ndarray` arrays: it knows nothing of gRPC, SQL or files.
//! `data` reads descriptor tables, `fit` runs the whole model-building
//! procedure, `scoring` is the fitted pipeline every front end shares (the
//! `predict` command and the service give bit-identical answers because both
//! call it), `bundle` stores it in one checksummed file, `report` writes the
//! fit report, `service` and `audit` serve and record, `cli` is the command
//! line.

pub mod audit;
pub mod bundle;
pub mod cli;
pub mod conformal;
pub mod data;
pub mod demo;
pub mod domain;
pub mod fit;
pub mod linalg;
pub mod models;
pub mod monitor;
pub mod report;
pub mod scoring;
pub mod service;
pub mod space;
pub mod telemetry;
pub mod validate;

/// Code generated from `proto/plumbline/v1/*.proto`.
pub mod pb {
    tonic::include_proto!("plumbline.v1");

    mod candidate;
    pub use candidate::Candidate;

    /// The encoded descriptor set, served by gRPC reflection.
    pub const FILE_DESCRIPTOR_SET: &[u8] =
        tonic::include_file_descriptor_set!("plumbline_descriptor");
}
