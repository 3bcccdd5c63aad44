//! The pure-Rust zstd decoder (the `ruzstd` crate) on one file.
include!("../decode.rs");

fn main() -> ExitCode {
    main_with(|file| {
        let decoder = ruzstd::decoding::StreamingDecoder::new(std::io::BufReader::new(file))
            .map_err(std::io::Error::other)?;
        Ok(Box::new(decoder))
    })
}
