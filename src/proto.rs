//! Generated gRPC types for `holdout.v1`. They stay at the edge: `service/` converts them to
//! domain types.
#![allow(missing_docs, unreachable_pub, clippy::all, clippy::pedantic)]

/// The `holdout.v1` package.
pub mod v1 {
    tonic::include_proto!("holdout.v1");

    /// Encoded descriptor set of `holdout.v1`, for server reflection.
    pub const FILE_DESCRIPTOR_SET: &[u8] =
        include_bytes!(concat!(env!("OUT_DIR"), "/holdout_v1_descriptor.bin"));
}
