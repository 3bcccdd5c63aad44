//! Fuzzes the ONNX signature reader: any bytes must give a signature or an error, never a panic
//! or a large allocation; what it checks (the readers agree, every reading rule, the recorded
//! classifier re-read as a device re-reads it) is in `ampoule_verify::fuzzing::onnx`.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| ampoule_verify::fuzzing::onnx(data));
