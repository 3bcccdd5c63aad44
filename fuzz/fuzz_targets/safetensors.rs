//! Fuzzes the safetensors signature reader: any bytes must give a signature or an error, never
//! a panic or a large allocation; what it checks (the tensor list, the classifier tensor re-read
//! as a device re-reads it) is in `ampoule_verify::fuzzing::safetensors`.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| ampoule_verify::fuzzing::safetensors(data));
