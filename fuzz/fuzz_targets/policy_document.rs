//! Fuzzes `ampoule_verify::fuzzing::policy_document`: what it reaches is written beside that
//! function (crates/verify/src/fuzzing.rs).
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| ampoule_verify::fuzzing::policy_document(data));
