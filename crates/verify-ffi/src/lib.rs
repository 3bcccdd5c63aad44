//! ampoule-verify for apps not written in Rust: a C interface over the library's safe update
//! path (open a store with the app's trust, version and policy document; install an offline
//! file, or update step by step over the app's own HTTP ([`session`]); read the typed outcome; roll back; read the current model's path, labels and
//! manifest, signed metadata included), and nothing below it. `include/ampoule.h` declares it
//! and says, per function, who owns which memory and what may run at once; tests/header.rs
//! checks that the header and the functions here agree, and tests/c_api.rs compiles a C
//! program against both (also under AddressSanitizer).
//!
//! The rules the interface keeps, whatever the caller passes:
//! - every call returns a status code and fills the caller's own error object (code and a
//!   UTF-8 message with its length); no error state is kept per thread;
//! - objects are handles looked up in a registry of live ones ([`handles`]), so a freed,
//!   double-freed or made-up handle is refused, never dereferenced;
//! - strings are UTF-8 with explicit lengths, checked before use ([`raw`]);
//! - no panic crosses the boundary: each function catches them (the crate needs
//!   `panic = "unwind"`, Rust's default, which the workspace states).

pub mod ffi;
pub mod handles;
mod raw;
pub mod session;
pub mod status;
