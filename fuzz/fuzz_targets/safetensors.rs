//! Fuzzes the safetensors signature reader: any bytes must give a signature or an error, never
//! a panic or a large allocation, and a signature must survive its own JSON.
#![no_main]

use ampoule_verify::model::{ModelSignature, read_model_signature};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(Some(signature)) = read_model_signature("model.safetensors", data, data.len() as u64)
    {
        let json = serde_json::to_string(&signature).expect("a signature serializes");
        let back: ModelSignature = serde_json::from_str(&json).expect("a signature reads back");
        assert_eq!(back, signature);
    }
});
