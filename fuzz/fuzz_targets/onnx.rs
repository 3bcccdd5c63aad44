//! Fuzzes the ONNX signature reader: any bytes must give a signature or an error, never a panic
//! or a large allocation; the streaming and the seeking reader must agree; and a signature must
//! survive its own JSON.
#![no_main]

use std::io::Cursor;

use ampoule_verify::model::{ModelSignature, read_model_signature, read_model_signature_seekable};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let len = data.len() as u64;
    let streamed = read_model_signature("model.onnx", data, len);
    let seeked = read_model_signature_seekable("model.onnx", Cursor::new(data), len);
    match (streamed, seeked) {
        (Ok(a), Ok(b)) => {
            assert_eq!(a, b);
            if let Some(signature) = a {
                let json = serde_json::to_string(&signature).expect("a signature serializes");
                let back: ModelSignature =
                    serde_json::from_str(&json).expect("a signature reads back");
                assert_eq!(back, signature);
            }
        }
        (Err(a), Err(b)) => assert_eq!(a.to_string(), b.to_string()),
        (a, b) => panic!("the readers disagree: {a:?} / {b:?}"),
    }
});
