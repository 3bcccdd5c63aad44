//! The decoder apps' zero: the same program passing the file's bytes through undecoded.
include!("../decode.rs");

fn main() -> ExitCode {
    main_with(|file| Ok(Box::new(file)))
}
