// The decoder apps' shared part (included by `zstd_c`, `zstd_rust`, `zstd_none`): read one
// zstd file, decode it through `decoder` up to 1 GiB, and print the decoded length and an
// FNV-1a hash of the bytes, so the three can be compared for size and the two real ones
// against each other for output.

use std::io::Read;
use std::process::ExitCode;

const LIMIT: u64 = 1 << 30;

pub fn main_with(decoder: fn(std::fs::File) -> std::io::Result<Box<dyn Read>>) -> ExitCode {
    let Some(path) = std::env::args().nth(1) else {
        eprintln!("usage: FILE.zst");
        return ExitCode::from(2);
    };
    let result = std::fs::File::open(&path)
        .and_then(decoder)
        .and_then(|reader| {
            let mut reader = reader.take(LIMIT + 1);
            let mut buf = vec![0u8; 1 << 16];
            let (mut len, mut hash) = (0u64, 0xcbf2_9ce4_8422_2325_u64);
            loop {
                let n = reader.read(&mut buf)?;
                if n == 0 {
                    return Ok((len, hash));
                }
                len += n as u64;
                for b in &buf[..n] {
                    hash = (hash ^ u64::from(*b)).wrapping_mul(0x0100_0000_01b3);
                }
            }
        });
    match result {
        Ok((len, hash)) => {
            println!("{len} bytes, fnv1a {hash:016x}");
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprintln!("error: {path}: {e}");
            ExitCode::from(1)
        }
    }
}
