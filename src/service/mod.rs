//! The gRPC service.
pub mod settings;
