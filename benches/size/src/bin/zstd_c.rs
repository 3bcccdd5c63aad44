//! The C zstd decoder (the `zstd` crate over libzstd, as ampoule-verify links it), with the
//! window the verifier allows (2^27), on one file.
include!("../decode.rs");

fn main() -> ExitCode {
    main_with(|file| {
        let mut decoder = zstd::stream::read::Decoder::new(file)?;
        decoder.window_log_max(27)?;
        Ok(Box::new(decoder))
    })
}
