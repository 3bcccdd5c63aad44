//! The app skeleton both binaries share: arguments, reading the trusted key, one line of
//! output, exit codes. Only the step passed to [`run`] differs between `baseline` and
//! `installer`, so their size difference is what calling ampoule-verify costs an app, not
//! what the skeleton costs.

use std::error::Error;
use std::path::PathBuf;
use std::process::ExitCode;

/// What both binaries are asked to do: take the release that the channel `stable` of the
/// release tree at `tree` offers into the store at `store`.
pub struct Request {
    /// The app's models directory.
    pub store: PathBuf,
    /// Where the release comes from: a release tree on disk (the files any web server would
    /// serve, so the app needs no HTTP stack: it answers the update's requests from these
    /// files), an offline file, a bundle file, or the feed's URL (`url_update`).
    pub tree: PathBuf,
    /// The trusted public key, as PEM text.
    pub key_pem: String,
    /// The app's own version.
    pub app_version: String,
}

/// A step that does the work and says what it did in one line.
pub type Step = fn(&Request) -> Result<String, Box<dyn Error>>;

const USAGE: &str = "usage: STORE-DIR SOURCE PUBLIC-KEY.pem APP-VERSION";

/// Runs `step` on the command line's request. Exit codes follow the CLI's: 0 done, 1 the step
/// failed, 2 usage error or unreadable key file.
pub fn run(step: Step) -> ExitCode {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let [store, tree, key, app_version] = args.as_slice() else {
        eprintln!("{USAGE}");
        return ExitCode::from(2);
    };
    let key_pem = match std::fs::read_to_string(key) {
        Ok(pem) => pem,
        Err(e) => {
            eprintln!("error: {key}: {e}");
            return ExitCode::from(2);
        }
    };
    let request = Request {
        store: store.into(),
        tree: tree.into(),
        key_pem,
        app_version: app_version.clone(),
    };
    match step(&request) {
        Ok(line) => {
            println!("{line}");
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprintln!("error: {e}");
            ExitCode::from(1)
        }
    }
}
