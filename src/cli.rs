//! Raw command-line arguments, exactly as clap parses them. Each command validates its own
//! arguments once into settings before doing any work.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

const EXIT_CODES: &str = "\
Exit codes:
  0  success
  1  refused: a signature, digest, version, size or policy check said no
  2  usage error, or a file could not be read or written";

#[derive(Parser, Debug)]
#[command(
    name = "ampoule",
    version,
    about = "Pack, sign, verify and publish machine-learning model bundles for devices",
    long_about = "Pack a model file and its label list into a versioned, signed, compressed \
bundle (.ampoule), and check bundles the way a device will before it swaps a model in.",
    after_help = EXIT_CODES
)]
pub struct Cli {
    /// Print machine-readable JSON on stdout instead of text.
    #[arg(long, global = true)]
    pub json: bool,

    #[command(subcommand)]
    pub command: Command,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    /// Make a new Ed25519 signing key pair.
    #[command(after_help = "Examples:
  ampoule keygen --secret release.secret.pem --public release.public.pem
  AMPOULE_PASS=... ampoule keygen --secret ci.secret.pem --public ci.public.pem --encrypt --passphrase-env AMPOULE_PASS

The secret key file is created owner-only (0600) and is never overwritten.
Keep it off shared disks and out of version control.")]
    Keygen(KeygenArgs),

    /// Pack a model and its labels into a bundle, optionally signing it.
    #[command(after_help = "Examples:
  ampoule pack --model species.onnx --labels labels.txt --name trailcam-species \\
      --version 1.1.0 --requires-app '>=2.0.0, <3.0.0' --key release.secret.pem -o species-1.1.0.ampoule
  SOURCE_DATE_EPOCH=1764547200 ampoule pack ... (same inputs and time give a byte-identical bundle)")]
    Pack(PackArgs),

    /// Add a signature to a bundle (signing twice with one key changes nothing).
    #[command(after_help = "Example:
  ampoule sign species-1.1.0.ampoule --key second-signer.secret.pem")]
    Sign(SignArgs),

    /// Check a bundle as a device would, and optionally unpack it.
    #[command(after_help = "Examples:
  ampoule verify species-1.1.0.ampoule --trust release.public.pem --app-version 2.3.0
  ampoule verify species-1.1.0.ampoule --trust release.public.pem --app-version 2.3.0 \\
      --installed 1.0.0 --max-size 200000000 --extract ./model-1.1.0

Exit code 1 means the bundle was refused; the message says which check failed.")]
    Verify(VerifyArgs),

    /// Show what is inside a bundle: manifest, files, sizes, digests, signers.
    #[command(after_help = "Examples:
  ampoule inspect species-1.1.0.ampoule
  ampoule inspect species-1.1.0.ampoule --trust release.public.pem --json")]
    Inspect(InspectArgs),

    /// Publish a bundle as the current release of a channel in a release tree.
    #[command(after_help = "Examples:
  ampoule publish species-1.1.0.ampoule --tree ./release --channel beta --key feed.secret.pem --rollout 10
  ampoule publish species-1.1.0.ampoule --tree ./release --channel beta --key feed.secret.pem --rollout 100

The tree is plain static files: serve it with any web server. Devices poll feeds/<channel>.json.
Publishing the current bundle again renews its feed (new sequence and expiry) and sets its
rollout; publish at least once per --expires-in, or devices stop trusting the channel.
A name and version, once in the tree, always mean the same file.")]
    Publish(PublishArgs),

    /// Pull a channel's current release: the release before it becomes current again.
    #[command(after_help = "Example:
  ampoule withdraw --tree ./release --channel beta --key feed.secret.pem

The new feed has a higher sequence. With no earlier release the channel offers nothing
(release: null), and devices keep what they have. Devices that already installed the
withdrawn release keep it too: they never go back to an older version.")]
    Withdraw(WithdrawArgs),

    /// Serve a release tree over HTTP, for demos and tests only.
    #[command(after_help = "Example:
  ampoule serve --tree ./release --addr 127.0.0.1:8000

A small static file server for trying things on one machine: GET, HEAD and single byte
ranges, nothing else. It is not meant for production: there any static web server, CDN or
object store serves the tree. It runs until interrupted (Ctrl-C).")]
    Serve(ServeArgs),

    /// Run the trail-camera story end to end on generated data.
    #[command(after_help = "Example:
  ampoule demo                 (works in a fresh temporary directory and removes it)
  ampoule demo --dir ./demo-out (keeps everything it made for a look afterwards)")]
    Demo(DemoArgs),
}

/// Where a secret key's passphrase comes from.
#[derive(Args, Debug, Clone)]
pub struct PassphraseArgs {
    /// Read the passphrase from this environment variable (for CI); otherwise it is asked
    /// for on the terminal when the key is encrypted.
    #[arg(long, value_name = "VAR")]
    pub passphrase_env: Option<String>,
}

#[derive(Args, Debug)]
pub struct KeygenArgs {
    /// Where to write the secret key (PKCS#8 PEM, mode 0600).
    #[arg(long, value_name = "FILE")]
    pub secret: PathBuf,
    /// Where to write the public key (SubjectPublicKeyInfo PEM).
    #[arg(long, value_name = "FILE")]
    pub public: PathBuf,
    /// Encrypt the secret key with a passphrase (PKCS#8 PBES2, scrypt and AES-256-CBC).
    #[arg(long)]
    pub encrypt: bool,
    #[command(flatten)]
    pub passphrase: PassphraseArgs,
}

#[derive(Args, Debug)]
pub struct PackArgs {
    /// The model file (any format; its extension is kept).
    #[arg(long, value_name = "FILE")]
    pub model: PathBuf,
    /// The label list: UTF-8, one label per line, in output-index order.
    #[arg(long, value_name = "FILE")]
    pub labels: PathBuf,
    /// The bundle name: which model line this is (lowercase letters, digits, - _ .).
    #[arg(long)]
    pub name: String,
    /// The release version (Semantic Versioning 2.0.0).
    #[arg(long)]
    pub version: String,
    /// The app versions this model works with, as a SemVer requirement.
    #[arg(long, value_name = "REQ", default_value = "*")]
    pub requires_app: String,
    /// The creation time (RFC 3339 UTC like 2026-12-01T08:00:00Z, or Unix seconds);
    /// defaults to SOURCE_DATE_EPOCH when set, else now.
    #[arg(long, value_name = "TIME")]
    pub created: Option<String>,
    /// Sign with this secret key; without it the bundle is unsigned and says so.
    #[arg(long, value_name = "SECRET.pem")]
    pub key: Option<PathBuf>,
    #[command(flatten)]
    pub passphrase: PassphraseArgs,
    /// The bundle file to write; it must not exist yet.
    #[arg(short = 'o', long = "out", value_name = "OUT.ampoule")]
    pub out: PathBuf,
}

#[derive(Args, Debug)]
pub struct SignArgs {
    /// The bundle to sign; it is replaced atomically.
    pub bundle: PathBuf,
    /// The secret key to sign with.
    #[arg(long, value_name = "SECRET.pem")]
    pub key: PathBuf,
    #[command(flatten)]
    pub passphrase: PassphraseArgs,
}

#[derive(Args, Debug)]
pub struct VerifyArgs {
    /// The bundle to check.
    pub bundle: PathBuf,
    /// A trusted public key (repeat for several).
    #[arg(long, value_name = "PUB.pem", required = true)]
    pub trust: Vec<PathBuf>,
    /// The app version to check the bundle's requirement against; without it the
    /// requirement is shown but not checked.
    #[arg(long, value_name = "X")]
    pub app_version: Option<String>,
    /// The version installed now: only a newer bundle is accepted.
    #[arg(long, value_name = "V")]
    pub installed: Option<String>,
    /// Accept only a bundle with this name.
    #[arg(long)]
    pub name: Option<String>,
    /// The largest bundle, and the most bytes it may unpack to.
    #[arg(long, value_name = "BYTES")]
    pub max_size: Option<u64>,
    /// Unpack the checked model and labels into this new directory.
    #[arg(long, value_name = "DIR")]
    pub extract: Option<PathBuf>,
}

#[derive(Args, Debug)]
pub struct InspectArgs {
    /// The bundle to look into.
    pub bundle: PathBuf,
    /// Public keys to check signatures against (optional; without them signatures are
    /// listed but not checked).
    #[arg(long, value_name = "PUB.pem")]
    pub trust: Vec<PathBuf>,
}

#[derive(Args, Debug)]
pub struct DemoArgs {
    /// Work in this directory and keep what was made (it must not exist yet).
    #[arg(long, value_name = "DIR")]
    pub dir: Option<PathBuf>,
}

#[derive(Args, Debug)]
pub struct PublishArgs {
    /// The signed bundle to publish.
    pub bundle: PathBuf,
    /// The release tree (a directory of static files; created if missing).
    #[arg(long, value_name = "DIR")]
    pub tree: PathBuf,
    /// The channel to publish on (lowercase letters, digits, - _ .), like stable or beta.
    #[arg(long, value_name = "NAME")]
    pub channel: String,
    /// The secret key that signs the channel's feed.
    #[arg(long, value_name = "SECRET.pem")]
    pub key: PathBuf,
    #[command(flatten)]
    pub passphrase: PassphraseArgs,
    /// Keys the bundle's signature is checked against before publishing (repeat for
    /// several); without it, the bundle must be signed by the feed key itself.
    #[arg(long, value_name = "PUB.pem")]
    pub trust: Vec<PathBuf>,
    /// The share of devices that should take this release, 0 to 100.
    #[arg(long, value_name = "PERCENT", default_value_t = 100)]
    pub rollout: u8,
    /// How long the feed stays valid; devices refuse it afterwards (like 7d, 12h, 90m).
    #[arg(long, value_name = "DURATION", default_value = "7d")]
    pub expires_in: String,
    /// The base URL of a copy of this tree (repeat for several); the feed lists the bundle
    /// there too, tried in order after the tree itself.
    #[arg(long, value_name = "URL")]
    pub mirror: Vec<String>,
}

#[derive(Args, Debug)]
pub struct WithdrawArgs {
    /// The release tree.
    #[arg(long, value_name = "DIR")]
    pub tree: PathBuf,
    /// The channel whose current release is pulled.
    #[arg(long, value_name = "NAME")]
    pub channel: String,
    /// The secret key that signs the channel's feed.
    #[arg(long, value_name = "SECRET.pem")]
    pub key: PathBuf,
    #[command(flatten)]
    pub passphrase: PassphraseArgs,
    /// How long the new feed stays valid (like 7d, 12h, 90m).
    #[arg(long, value_name = "DURATION", default_value = "7d")]
    pub expires_in: String,
}

#[derive(Args, Debug)]
pub struct ServeArgs {
    /// The release tree to serve.
    #[arg(long, value_name = "DIR")]
    pub tree: PathBuf,
    /// The address to listen on; port 0 picks a free port (the first line printed says which).
    #[arg(long, value_name = "IP:PORT", default_value = "127.0.0.1:8000")]
    pub addr: String,
}
