//! The framewise wire contract: types and gRPC stubs generated from `proto/framewise/v1/framewise.proto`.
//!
//! No engine code lives here; the server maps these types to the engine's and back.

/// Version 1 of the contract.
pub mod v1 {
    #![allow(clippy::all, missing_docs)]
    tonic::include_proto!("framewise.v1");

    /// Encoded file descriptor set of the contract (for reflection and for clients in other languages).
    pub const FILE_DESCRIPTOR_SET: &[u8] =
        tonic::include_file_descriptor_set!("framewise_v1_descriptor");
}
