//! Raw command-line arguments, exactly as clap parses them. Each command validates its own
//! arguments once into settings before doing any work.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

const EXIT_CODES: &str = "\
Exit codes:
  0  success
  1  refused: a signature, digest, version, size or policy check said no, a file
     given as a bundle is not one, ledger check found problems
  2  usage error, a file that could not be read or written, or a key or trust-set
     file that does not parse
With --json an error is one document with ok, error, exit_code and kind.";

#[derive(Parser, Debug)]
#[command(
    name = "ampoule",
    version,
    about = "Pack, sign, verify and publish machine-learning model bundles for devices",
    long_about = "Pack a model file and its label list into a versioned, signed, compressed \
bundle (.ampoule), publish it on channels, keep an audit ledger of everything shipped, and \
check bundles the way a device will before it swaps a model in.",
    after_help = EXIT_CODES
)]
pub struct Cli {
    /// Print machine-readable JSON on stdout instead of text.
    #[arg(long, global = true)]
    pub json: bool,

    /// Print nothing on success and show no progress bars; errors still go to stderr, and
    /// --json output is unchanged.
    #[arg(short, long, global = true)]
    pub quiet: bool,

    #[command(subcommand)]
    pub command: Command,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    /// Make a new Ed25519 signing key pair.
    #[command(after_help = "Examples:
  ampoule keygen --secret release.secret.pem --public release.public.pem
  AMPOULE_PASS=... ampoule keygen --secret ci.secret.pem \\
      --public ci.public.pem --encrypt --passphrase-env AMPOULE_PASS

The secret key file is created owner-only (0600) and is never overwritten.
Keep it off shared disks and out of version control.")]
    Keygen(KeygenArgs),

    /// Print the key id of each key file (public, secret or encrypted secret) and the keys of
    /// each trust set with their roles.
    #[command(after_help = "Examples:
  ampoule key-id release.public.pem release.secret.pem
  AMPOULE_PASS=... ampoule key-id ci.secret.pem --passphrase-env AMPOULE_PASS
  ampoule key-id trust-2.json --json

Messages, trust sets and the ledger name keys by id; this says which file is which.
A secret key is read with the same checks as when signing (owner-only, passphrase).")]
    KeyId(KeyIdArgs),

    /// Pack a model and its labels into a bundle, optionally signing it.
    #[command(after_help = "Examples:
  ampoule pack --model species.onnx --labels labels.txt \\
      --name trailcam-species --version 1.1.0 \\
      --requires-app '>=2.0.0, <3.0.0' --key release.secret.pem \\
      -o species-1.1.0.ampoule
  # The same inputs and creation time give a byte-identical bundle:
  SOURCE_DATE_EPOCH=1796112000 ampoule pack --model species.onnx \\
      --labels labels.txt --name trailcam-species --version 1.1.0 \\
      --requires-app '>=2.0.0, <3.0.0' -o species-1.1.0.ampoule
  # Signed metadata: strings with --meta; numbers and arrays from a JSON object
  # in metadata.json, like {\"eval\": {\"top1\": 0.912}}
  ampoule pack --model species.onnx --labels labels.txt \\
      --name trailcam-species --version 1.1.0 --key release.secret.pem \\
      --meta data.snapshot=2026-11-30 --meta notes='Adds pine marten' \\
      --meta-file metadata.json -o species-1.1.0.ampoule
  # Also a delta for devices on 1.0.0: species-1.1.0-from-1.0.0.ampoule-delta
  ampoule pack --model species.onnx --labels labels.txt \\
      --name trailcam-species --version 1.1.0 --key release.secret.pem \\
      --delta-from species-1.0.0.ampoule -o species-1.1.0.ampoule

Metadata keys are dotted paths (segments of a-z, 0-9, _; at most 8 deep); a key set twice
is refused. Documented keys and their types: preprocess.input_size, .mean, .std, .scale
(numbers or arrays of numbers), preprocess.colour_order (rgb or bgr), eval.* (numbers),
data.snapshot and notes (strings). The object is at most 16 KiB as compact JSON.")]
    Pack(PackArgs),

    /// Make a delta: the patches that rebuild a newer bundle's files from an older one's,
    /// carrying the newer bundle's manifest and signatures as they are (no key needed).
    #[command(after_help = "Examples:
  ampoule delta --from species-1.0.0.ampoule species-1.1.0.ampoule \\
      -o species-1.0.0-to-1.1.0.ampoule-delta
  ampoule inspect species-1.0.0-to-1.1.0.ampoule-delta
  ampoule delta --from species-1.0.0.ampoule species-1.1.0.ampoule \\
      -o species-1.0.0-to-1.1.0.ampoule-delta --json

A device on 1.0.0 rebuilds 1.1.0's files from its own and checks them against 1.1.0's
signed manifest. The delta names its base by the SHA-256 of the base's files, never by
version. Applying one takes about 17 MiB of memory whatever the model's size.")]
    Delta(DeltaArgs),

    /// Add a signature to a bundle (signing twice with one key changes nothing).
    #[command(after_help = "Examples:
  ampoule sign species-1.1.0.ampoule --key second-signer.secret.pem
  # An outside signer signs exactly the exported bytes:
  ampoule sign species-1.1.0.ampoule --export-request request.bin
  openssl pkeyutl -sign -inkey secret.pem -rawin -in request.bin -out sig.bin
  ampoule sign species-1.1.0.ampoule --attach sig.bin \\
      --pubkey signer.public.pem")]
    Sign(SignArgs),

    /// Check a bundle as a device would, and optionally unpack it.
    #[command(after_help = "Examples:
  ampoule verify species-1.1.0.ampoule --trust release.public.pem \\
      --app-version 2.3.0
  ampoule verify species-1.1.0.ampoule --trust release.public.pem \\
      --app-version 2.3.0 --installed 1.0.0 --max-size 200000000 \\
      --extract ./model-1.1.0
  ampoule verify species-1.1.0.ampoule --trust release.public.pem \\
      --app-version 2.3.0 --policy camera-policy.json

Exit code 1 means the bundle was refused; the message says which check failed.

A policy document (only policy_format is required; FORMAT.md has every key), the
same file the C interface reads:
  {\"policy_format\": 1, \"bundle_name\": \"trailcam-species\",
   \"model\": {\"inputs\": [{\"name\": \"image\", \"dtype\": \"float32\",
                          \"shape\": \"[*, 3, 96, 96]\"}],
             \"outputs\": [{\"name\": \"species\"}], \"classifier_output\": \"species\"},
   \"labels\": {\"min_count\": 2, \"max_count\": 64, \"required\": [\"empty frame\"]},
   \"metadata\": {\"preprocess.colour_order\": \"rgb\"}}")]
    Verify(VerifyArgs),

    /// Show what is inside a bundle: manifest, files, sizes, digests, signers.
    #[command(after_help = "Examples:
  ampoule inspect species-1.1.0.ampoule
  ampoule inspect species-1.1.0.ampoule --trust release.public.pem --json")]
    Inspect(InspectArgs),

    /// Show what changed between two bundles: labels (reordering is flagged loudly),
    /// tensors, parameters, sizes, signers.
    #[command(after_help = "Examples:
  ampoule diff species-1.0.0.ampoule species-1.1.0.ampoule
  ampoule diff species-1.0.0.ampoule species-1.1.0.ampoule --json
  ampoule diff species-1.0.0.ampoule species-1.1.0.ampoule --fail-on breaking
  ampoule diff species-1.0.0.ampoule species-1.0.0-to-1.1.0.ampoule-delta

diff reads both payloads to compare the label lists; it does not check signatures.
Breaking changes (listed under \"breaking\" in --json): a label moved to another index,
a label removed, an input or output changed or removed, a preprocess.* metadata key
added, removed or changed. With --fail-on breaking, any of them makes diff exit 1.
Given a delta (.ampoule-delta) and a bundle, diff says whether the bundle is the delta's
base, the release it sends, or neither, with their sizes: a delta is not a release.")]
    Diff(DiffArgs),

    /// Manage trust sets: which keys may sign what, and how many must agree.
    #[command(after_help = "Examples:
  ampoule trust init --key a.public.pem --key b.public.pem --key c.public.pem \\
      --threshold bundle=2,trust_set=2 --expires-in 365d -o trust-1.json
  ampoule trust sign trust-1.json --key a.secret.pem  # each signer in turn
  ampoule trust show trust-1.json
  ampoule trust remove trust-1.json --key-id 3f0c... -o trust-2.json
  ampoule trust show trust-2.json --trusted trust-1.json")]
    Trust(TrustArgs),

    /// Publish a bundle as the current release of a channel in a release tree.
    #[command(after_help = "Examples:
  ampoule publish species-1.1.0.ampoule --tree ./release --channel beta \\
      --key feed.secret.pem --trust release.public.pem --rollout 10
  ampoule publish species-1.1.0.ampoule --tree ./release --channel beta \\
      --key feed.secret.pem --trust release.public.pem --rollout 100 --dry-run
  ampoule publish species-1.1.0.ampoule --tree ./release --channel beta \\
      --key feed.secret.pem --trust release.public.pem --rollout 100
  # Rotate keys: publish the next trust set, which every feed then names
  ampoule publish --trust-set trust-2.json --tree ./release \\
      --key feed.secret.pem
  # Tree heads signed outside the runner, which holds the feed key only
  ampoule publish species-1.1.0.ampoule --tree ./release --channel stable \\
      --key feed.secret.pem --trust release.public.pem \\
      --tree-head-signer ./sign-tree-head \\
      --tree-head-signer-key heads.public.pem
  # Deltas from the last 5 releases of the channel instead of 3 (0: none)
  ampoule publish species-1.2.0.ampoule --tree ./release --channel stable \\
      --key feed.secret.pem --trust release.public.pem --deltas 5

The tree is plain static files: serve it with any web server. Devices poll feeds/<channel>.json.
A new release gets deltas (bundles/<sha256>.ampoule-delta) from the channel's last --deltas
earlier releases of its name, withdrawn ones included: a delta is a way to send the release to a
device on that base, not a release; it carries the release's own signatures, so no key is
needed. One that is over 3/4 of the bundle is skipped, and said so. A renewal offers the
deltas it offered before; a withdraw offers the release before it as it was published.
Publishing the current bundle again renews its feed (new sequence and expiry) and sets its
rollout, and says it only renewed; publish at least once per --expires-in, or devices stop
trusting the channel. --dry-run makes every check and shows the sequence, release, rollout
and ledger entry it would write, and writes nothing.
A name and version, once in the tree, always mean the same file.
A trust set is published only if it verifies as the successor of the tree's current one;
every channel's feed then names it, and devices take it at their next poll. With a trust set
in the tree, a bundle is checked against its bundle keys and threshold (unless --trust).")]
    Publish(PublishArgs),

    /// Pull a channel's current release: the release before it becomes current again.
    #[command(after_help = "Examples:
  ampoule withdraw --tree ./release --channel beta --key feed.secret.pem \\
      --version 1.1.0 --dry-run
  ampoule withdraw --tree ./release --channel beta --key feed.secret.pem \\
      --version 1.1.0

--version names the release to pull, which must be the current one: a rerun after it was
pulled changes nothing and exits 0. --dry-run makes every check and shows what it would
write, and writes nothing. The new feed has a higher sequence. With no earlier release the channel offers nothing
(release: null), and devices keep what they have. Devices that already installed the
withdrawn release keep it too: they never go back to an older version.")]
    Withdraw(WithdrawArgs),

    /// Read the audit ledger: what was shipped, whether history was ever rewritten, and the
    /// proof that a bundle was published.
    #[command(after_help = "Examples:
  ampoule ledger list --tree ./release --channel stable
  ampoule ledger list --url https://models.example.invalid/ --csv > shipped.csv
  ampoule ledger check --tree ./release --trust feed.public.pem \\
      --since saved-tree-head.json
  ampoule ledger check --url https://models.example.invalid/ \\
      --trust-set trust-3.json
  ampoule ledger prove species-1.1.0.ampoule --tree ./release --json

Keep the tree heads you have seen (ledger/tree-head.json at each audit) and pass the last one
with --since: check then proves the ledger only grew since. Exit code 1 means check found
problems; each is printed.")]
    Ledger(LedgerArgs),

    /// Write one file that holds what a device needs to update on a channel without a
    /// network: the feed, its trust set, the ledger's steps and the bundle.
    #[command(after_help = "Examples:
  ampoule offline --tree ./release --channel stable -o stable.ampoule-offline
  # On the device, from the SD card:
  ampoule update --store /media/camera/models --offline stable.ampoule-offline \\
      --trust-set trust-1.json --app-version 2.3.0

The file holds the channel's current feed, the trust set it names, every consistency step
of the audit ledger up to the feed's tree head, and the bundle the feed offers. The device
checks everything as it does online except the feed's expiry: without a network it cannot
tell a fresh feed from a stale one. So hand out files made from the current feed, and
replace them when you publish. An older file after a newer install is refused as a replay.")]
    Offline(OfflineArgs),

    /// Serve a release tree over HTTP, for demos and tests only.
    #[command(after_help = "Example:
  ampoule serve --tree ./release --addr 127.0.0.1:8000

A small static file server for trying things on one machine: GET, HEAD and single byte
ranges, nothing else. It is not meant for production: there any static web server, CDN or
object store serves the tree. It runs until interrupted (Ctrl-C).")]
    Serve(ServeArgs),

    /// Check a channel's feed as a device does, and install a newer bundle into a store.
    #[command(after_help = "Examples:
  ampoule update --store ./camera \\
      --feed http://127.0.0.1:8000/feeds/stable.json \\
      --trust-bundle release.public.pem --trust-feed feed.public.pem \\
      --app-version 2.3.0
  ampoule update --store ./camera \\
      --feed https://models.example.invalid/feeds/beta.json \\
      --trust-set trust-1.json --app-version 2.3.0 --device-id camera-0042 \\
      --json
  # No network: from a file made by 'ampoule offline'
  ampoule update --store ./camera --offline stable.ampoule-offline \\
      --trust release.public.pem --app-version 2.3.0 \\
      --policy camera-policy.json

The channel is the feed file's name (feeds/<channel>.json), or the offline file's channel,
unless --channel names it.
Without --device-id, the id in <store>/device-id is used, made at random on the first run.
The store remembers the highest version and feed sequence it accepted: an older bundle or
feed is refused from then on. Exit code 0: updated, or nothing to do (up to date, not in
the rollout yet, nothing offered, another app version needed); 1: the feed or bundle was
refused; 2: a network, disk or usage problem (trying again later may work).")]
    Update(UpdateArgs),

    /// Look into an on-device store, roll it back to the previous release, or clean it up.
    #[command(after_help = "Examples:
  ampoule store status --store ./camera --trust release.public.pem \\
      --app-version 2.3.0
  ampoule store rollback --store ./camera --trust release.public.pem \\
      --app-version 2.3.0
  ampoule store gc --store ./camera --trust-set trust-1.json --app-version 2.3.0

status checks the current release the way an app must before it loads the model (digests and
signatures). rollback is for an app whose own health check fails on a new model: the
previous release becomes current, and the version rolled back from stays refused.")]
    Store(StoreArgs),

    /// Run the trail-camera story end to end on generated data.
    #[command(after_help = "Examples:
  ampoule demo                   # in a temporary directory, removed afterwards
  ampoule demo --dir ./demo-out  # keeps everything it made")]
    Demo(DemoArgs),

    /// Print a shell completion script for ampoule on stdout.
    #[command(after_help = "Examples:
  ampoule completions bash > ~/.local/share/bash-completion/completions/ampoule
  ampoule completions zsh > ~/.zfunc/_ampoule
  ampoule completions fish > ~/.config/fish/completions/ampoule.fish")]
    Completions(CompletionsArgs),

    /// Print ampoule's manual page (roff, every command in one page) on stdout.
    #[command(after_help = "Examples:
  ampoule man > ampoule.1
  ampoule man | man -l -")]
    Man(ManArgs),
}

#[derive(Args, Debug)]
pub struct CompletionsArgs {
    /// The shell to complete for.
    #[arg(value_enum)]
    pub shell: clap_complete::Shell,
}

#[derive(Args, Debug)]
pub struct ManArgs {}

/// Where a secret key's passphrase comes from.
#[derive(Args, Debug, Clone)]
pub struct PassphraseArgs {
    /// Read the passphrase from this environment variable (for CI); otherwise it is asked
    /// for on the terminal when the key is encrypted.
    #[arg(long, value_name = "VAR")]
    pub passphrase_env: Option<String>,
}

#[derive(Args, Debug)]
pub struct KeyIdArgs {
    /// Key files (PEM) and trust-set files (JSON).
    #[arg(required = true, value_name = "FILE")]
    pub files: Vec<PathBuf>,
    #[command(flatten)]
    pub passphrase: PassphraseArgs,
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
    /// The model output (ONNX) or tensor (safetensors: a [C] bias or [C, in] weight) whose
    /// classes the labels name; needed when the model has several outputs, and for safetensors.
    /// A safetensors tensor is recorded in the signed manifest.
    #[arg(long, value_name = "NAME")]
    pub classifier_output: Option<String>,
    /// The dimension of the classifier output that counts the classes (0 is the first), when
    /// the shape alone does not say; recorded in the signed manifest, and devices use it.
    #[arg(long, value_name = "N")]
    pub class_dim: Option<u32>,
    /// Pack even if the label count differs from the classifier output's class count
    /// (the devices' own policy may still refuse it).
    #[arg(long)]
    pub allow_label_mismatch: bool,
    /// Record a string in the signed manifest's metadata under a dotted KEY, like
    /// data.snapshot=2026-11-30 or notes='Adds pine marten' (repeat for several).
    #[arg(long = "meta", value_name = "KEY=VALUE")]
    pub meta: Vec<String>,
    /// Record every value of the JSON object in this file in the signed metadata, numbers,
    /// booleans and arrays as they are (repeat for several files; at most 256 KiB each).
    #[arg(long = "meta-file", value_name = "FILE.json")]
    pub meta_file: Vec<PathBuf>,
    /// The bundle file to write; it must not exist yet.
    #[arg(short = 'o', long = "out", value_name = "OUT.ampoule")]
    pub out: PathBuf,
    /// Also write a delta from this older signed bundle of the same name to the new one,
    /// beside it as OUT-from-<old version>.ampoule-delta (needs --key: a delta carries the
    /// bundle's signatures as they are).
    #[arg(long, value_name = "OLD.ampoule", requires = "key")]
    pub delta_from: Option<PathBuf>,
}

#[derive(Args, Debug)]
pub struct DeltaArgs {
    /// The older bundle, the base devices hold.
    #[arg(long, value_name = "OLD.ampoule")]
    pub from: PathBuf,
    /// The newer bundle, the release the delta rebuilds.
    pub bundle: PathBuf,
    /// The delta file to write; it must not exist yet.
    #[arg(short = 'o', long = "out", value_name = "OUT.ampoule-delta")]
    pub out: PathBuf,
}

#[derive(Args, Debug)]
#[command(group(clap::ArgGroup::new("how").required(true).args(["key", "export_request", "attach"])))]
pub struct SignArgs {
    /// The bundle to sign; it is replaced atomically.
    pub bundle: PathBuf,
    #[command(flatten)]
    pub signer: SignerArgs,
}

/// How a signature is made: with a secret key here, or by a signer outside ampoule (a
/// hardware key, a key service, an air-gapped machine) that gets the exported request.
#[derive(Args, Debug)]
pub struct SignerArgs {
    /// The secret key to sign with.
    #[arg(long, value_name = "SECRET.pem")]
    pub key: Option<PathBuf>,
    /// Write exactly the bytes to sign (the signing context and the document) to this new
    /// file, for a signer outside ampoule; nothing else changes.
    #[arg(long, value_name = "OUT")]
    pub export_request: Option<PathBuf>,
    /// Attach a raw 64-byte Ed25519 signature made elsewhere over the exported request; it is
    /// checked against --pubkey before it is accepted.
    #[arg(long, value_name = "SIG", requires = "pubkey")]
    pub attach: Option<PathBuf>,
    /// The public key of the outside signer (with --attach).
    #[arg(long, value_name = "PUB.pem", requires = "attach")]
    pub pubkey: Option<PathBuf>,
    #[command(flatten)]
    pub passphrase: PassphraseArgs,
}

#[derive(Args, Debug)]
pub struct VerifyArgs {
    /// The bundle to check.
    pub bundle: PathBuf,
    /// A trusted public key (repeat for several).
    #[arg(long, value_name = "PUB.pem", required_unless_present = "trust_set")]
    pub trust: Vec<PathBuf>,
    /// Trust the bundle keys of this trust set, and require its bundle threshold.
    #[arg(long, value_name = "TRUST.json", conflicts_with = "trust")]
    pub trust_set: Option<PathBuf>,
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
    #[command(flatten)]
    pub require_meta: RequireMetaArgs,
}

/// The app's metadata requirements, as `verify` and `update` take them.
#[derive(Args, Debug)]
pub struct RequireMetaArgs {
    /// Refuse a bundle whose signed metadata does not hold VALUE at the dotted KEY (repeat
    /// for several). VALUE is JSON when it reads as a number, boolean, array or quoted
    /// string (96, true, [0.5,0.5], '"96"'), and a plain string otherwise (rgb).
    #[arg(long = "require-meta", value_name = "KEY=VALUE")]
    pub require_meta: Vec<String>,
    /// The app's policy document (JSON; see `ampoule verify --help` and FORMAT.md): what the
    /// app's code expects of a model and its labels, the bundle name it runs and its size
    /// limits. --name and --max-size, when given too, win over the document's.
    #[arg(long, value_name = "POLICY.json", conflicts_with = "require_meta")]
    pub policy: Option<PathBuf>,
}

#[derive(Args, Debug)]
pub struct InspectArgs {
    /// The bundle to look into.
    pub bundle: PathBuf,
    /// Public keys to check signatures against (optional; without them signatures are
    /// listed but not checked).
    #[arg(long, value_name = "PUB.pem")]
    pub trust: Vec<PathBuf>,
    /// Check signatures against the bundle keys and threshold of this trust set.
    #[arg(long, value_name = "TRUST.json", conflicts_with = "trust")]
    pub trust_set: Option<PathBuf>,
}

#[derive(Args, Debug)]
pub struct DiffArgs {
    /// The older bundle.
    pub old: PathBuf,
    /// The newer bundle.
    pub new: PathBuf,
    /// Exit 1 when the diff finds a change of this class (breaking: labels reordered or
    /// removed, an input or output changed or removed).
    #[arg(long, value_name = "CLASS", value_enum)]
    pub fail_on: Option<FailOn>,
}

/// Which changes make `diff --fail-on` exit 1.
#[derive(clap::ValueEnum, Clone, Copy, Debug, PartialEq, Eq)]
pub enum FailOn {
    /// Changes that make an app built for the old model misread the new one.
    Breaking,
}

#[derive(Args, Debug)]
pub struct DemoArgs {
    /// Work in this directory and keep what was made (it must not exist yet).
    #[arg(long, value_name = "DIR")]
    pub dir: Option<PathBuf>,
}

#[derive(Args, Debug)]
pub struct LedgerArgs {
    #[command(subcommand)]
    pub command: LedgerCommand,
}

#[derive(Subcommand, Debug)]
pub enum LedgerCommand {
    /// The history: every publish and withdraw, oldest first.
    #[command(after_help = "Examples:
  ampoule ledger list --tree ./release
  ampoule ledger list --tree ./release --channel stable --csv
  ampoule ledger list --url http://127.0.0.1:8000/ --json

Columns: entry number, time (UTC), event, channel, bundle name, version, bundle sha256,
the keys that signed the bundle, and the feed sequence that carried the change. Under a
publish, one line per delta it offers: a way to send that release to devices on a base, with
its size against the bundle's (a delta is not a release).")]
    List(LedgerListArgs),
    /// Recompute every hash, check every tree head's signature and consistency, and the
    /// entries against the tree; exit 1 on any problem.
    #[command(after_help = "Examples:
  ampoule ledger check --tree ./release --trust feed.public.pem
  ampoule ledger check --tree ./release --trust feed.public.pem \\
      --since audit-2026-11.json
  ampoule ledger check --url http://127.0.0.1:8000/ --trust-set trust-2.json \\
      --json

Problems (exit 1): a hash that does not match the entries, a tree head not signed by the
trusted keys, a current head not consistent with --since, a version reused with different
content, a feed-sequence gap, a bundle missing from the tree or different from the one logged,
a delta missing or different, or one publish would never make (not carrying the release's
signed manifest, not from an earlier release of the same name, or not rebuilding its files
from that base; each is rebuilt with the library's apply).
Warnings (exit 0): an entry no feed carried, left by a publish that stopped after its append.")]
    Check(LedgerCheckArgs),
    /// Print the inclusion proof of a bundle's latest publish entry, and verify it.
    #[command(after_help = "Examples:
  ampoule ledger prove species-1.1.0.ampoule --tree ./release
  ampoule ledger prove 5f1c...e9 --tree ./release --json  # by its sha256")]
    Prove(LedgerProveArgs),
}

/// Where the ledger is read from.
#[derive(Args, Debug)]
#[group(required = true, multiple = false)]
pub struct LedgerSourceArgs {
    /// A release tree on this machine.
    #[arg(long, value_name = "DIR")]
    pub tree: Option<PathBuf>,
    /// The base URL a release tree is served from (http or https).
    #[arg(long, value_name = "URL")]
    pub url: Option<String>,
}

#[derive(Args, Debug)]
pub struct LedgerListArgs {
    #[command(flatten)]
    pub source: LedgerSourceArgs,
    /// Only the entries of this channel.
    #[arg(long, value_name = "NAME")]
    pub channel: Option<String>,
    /// Print comma-separated values (RFC 4180) with a header line (not with --json).
    #[arg(long)]
    pub csv: bool,
    /// A public key that signs tree heads (repeat for several): the tree head is verified
    /// before anything is sized from it, and the listed entries must hash to its root.
    #[arg(long, value_name = "PUB.pem")]
    pub trust: Vec<PathBuf>,
    /// A trust set: tree heads need its tree_head threshold.
    #[arg(long, value_name = "FILE", conflicts_with = "trust")]
    pub trust_set: Option<PathBuf>,
    /// With --url and without --trust or --trust-set: read at most this many bytes in all
    /// from the server, since an unverified tree head cannot size the downloads.
    #[arg(long, value_name = "BYTES", default_value_t = 256 * 1024 * 1024)]
    pub max_bytes: u64,
}

#[derive(Args, Debug)]
pub struct LedgerCheckArgs {
    #[command(flatten)]
    pub source: LedgerSourceArgs,
    /// A tree head saved at an earlier audit (a copy of ledger/tree-head.json): the current
    /// head must extend it.
    #[arg(long, value_name = "TREE-HEAD.json")]
    pub since: Option<PathBuf>,
    /// A public key that signs tree heads (repeat for several).
    #[arg(long, value_name = "PUB.pem", required_unless_present = "trust_set")]
    pub trust: Vec<PathBuf>,
    /// A trust set: tree heads need its tree_head threshold.
    #[arg(long, value_name = "FILE", conflicts_with = "trust")]
    pub trust_set: Option<PathBuf>,
}

#[derive(Args, Debug)]
pub struct LedgerProveArgs {
    /// The bundle file, or its sha256 as 64 hex characters.
    pub bundle: String,
    /// The release tree.
    #[arg(long, value_name = "DIR")]
    pub tree: PathBuf,
}

#[derive(Args, Debug)]
pub struct TrustArgs {
    #[command(subcommand)]
    pub command: TrustCommand,
}

#[derive(Subcommand, Debug)]
pub enum TrustCommand {
    /// Start a trust set: version 1, unsigned, every key with every role.
    #[command(after_help = "Examples:
  ampoule trust init --key a.public.pem --key b.public.pem --key c.public.pem \\
      --threshold bundle=2,trust_set=2 --expires-in 365d -o trust-1.json
  ampoule trust init --key release.public.pem --comment 'release laptop' \\
      --expires 2027-12-01T00:00:00Z -o trust-1.json

The new set is unsigned: each signer then runs 'ampoule trust sign'.")]
    Init(TrustInitArgs),
    /// Make the next version with more keys (unsigned: sign it in turn).
    #[command(after_help = "Examples:
  ampoule trust add trust-1.json --key d.public.pem -o trust-2.json
  ampoule trust add trust-1.json --key ci.public.pem --roles feed,tree_head \\
      --comment 'publishing runner' -o trust-2.json

The new version is unsigned: keys of the current version and of the new one sign it.")]
    Add(TrustAddArgs),
    /// Make the next version without some keys: how a key is revoked (unsigned).
    #[command(after_help = "Examples:
  ampoule trust remove trust-1.json --key c.public.pem -o trust-2.json
  ampoule trust remove trust-1.json --key-id 3f0c... --threshold trust_set=1 \\
      -o trust-2.json

A device on the old version takes the new one only when enough keys of both sign it.")]
    Remove(TrustRemoveArgs),
    /// Show keys, thresholds, version, expiry and signatures, and check them.
    #[command(after_help = "Examples:
  ampoule trust show trust-2.json
  ampoule trust show trust-2.json --trusted trust-1.json --json

Exit code 1 when a check prints \"refused\" (not signed as required, expired, or not a
successor a device on --trusted would take).")]
    Show(TrustShowArgs),
    /// Add a signature to a trust set, or export the request for an outside signer.
    #[command(after_help = "Examples:
  ampoule trust sign trust-2.json --key a.secret.pem
  ampoule trust sign trust-2.json --export-request request.bin
  ampoule trust sign trust-2.json --attach sig.bin --pubkey a.public.pem")]
    Sign(TrustSignArgs),
}

/// What every new version may change besides its keys.
#[derive(Args, Debug)]
pub struct TrustEditArgs {
    /// Thresholds as KIND=N, comma-separated or repeated; kinds are bundle, feed, tree_head
    /// and trust_set. A new set starts at 1 for each; a new version keeps the old ones.
    #[arg(long, value_name = "KIND=N", value_delimiter = ',')]
    pub threshold: Vec<String>,
    /// Expire this long from now: a number followed by d (days) or h (hours).
    #[arg(long, value_name = "DURATION", conflicts_with = "expires")]
    pub expires_in: Option<String>,
    /// Expire at this UTC time (2027-12-01T00:00:00Z).
    #[arg(long, value_name = "TIME")]
    pub expires: Option<String>,
    /// The new trust-set file to write; it must not exist yet.
    #[arg(short = 'o', long = "out", value_name = "OUT.json")]
    pub out: PathBuf,
}

#[derive(Args, Debug)]
pub struct TrustInitArgs {
    /// A public key to list (repeat for several).
    #[arg(long = "key", value_name = "PUB.pem", required = true)]
    pub keys: Vec<PathBuf>,
    /// The roles of these keys, comma-separated (default: all of bundle, feed, tree_head,
    /// trust_set).
    #[arg(long, value_name = "ROLES", value_delimiter = ',')]
    pub roles: Vec<String>,
    /// Who holds these keys, for people reading the set.
    #[arg(long, value_name = "TEXT", default_value = "")]
    pub comment: String,
    #[command(flatten)]
    pub edit: TrustEditArgs,
}

#[derive(Args, Debug)]
pub struct TrustAddArgs {
    /// The current trust-set file.
    pub trust_set: PathBuf,
    /// A public key to add (repeat for several).
    #[arg(long = "key", value_name = "PUB.pem", required = true)]
    pub keys: Vec<PathBuf>,
    /// The roles of the added keys, comma-separated (default: all).
    #[arg(long, value_name = "ROLES", value_delimiter = ',')]
    pub roles: Vec<String>,
    /// Who holds the added keys.
    #[arg(long, value_name = "TEXT", default_value = "")]
    pub comment: String,
    #[command(flatten)]
    pub edit: TrustEditArgs,
}

#[derive(Args, Debug)]
#[command(group(clap::ArgGroup::new("which").required(true).multiple(true).args(["key_ids", "keys"])))]
pub struct TrustRemoveArgs {
    /// The current trust-set file.
    pub trust_set: PathBuf,
    /// The id of a key to remove (repeat for several).
    #[arg(long = "key-id", value_name = "ID")]
    pub key_ids: Vec<String>,
    /// A public key to remove (repeat for several).
    #[arg(long = "key", value_name = "PUB.pem")]
    pub keys: Vec<PathBuf>,
    #[command(flatten)]
    pub edit: TrustEditArgs,
}

#[derive(Args, Debug)]
pub struct TrustShowArgs {
    /// The trust-set file to show.
    pub trust_set: PathBuf,
    /// The trust set a device has now: also check whether it would accept this one.
    #[arg(long, value_name = "TRUST.json")]
    pub trusted: Option<PathBuf>,
}

#[derive(Args, Debug)]
#[command(group(clap::ArgGroup::new("how").required(true).args(["key", "export_request", "attach"])))]
pub struct TrustSignArgs {
    /// The trust-set file to sign; it is replaced atomically. The signing key need not be
    /// listed in it: keys of the set trusted now sign its successor.
    pub trust_set: PathBuf,
    #[command(flatten)]
    pub signer: SignerArgs,
}

#[derive(Args, Debug)]
pub struct PublishArgs {
    /// The signed bundle to publish.
    #[arg(required_unless_present = "trust_set")]
    pub bundle: Option<PathBuf>,
    /// Publish this signed trust-set file instead of a bundle: it must verify as the
    /// successor of the tree's current trust set, and every channel's feed is signed again
    /// to name it.
    #[arg(
        long,
        value_name = "FILE",
        conflicts_with_all = ["bundle", "channel", "trust", "rollout", "mirror"]
    )]
    pub trust_set: Option<PathBuf>,
    /// The release tree (a directory of static files; created if missing).
    #[arg(long, value_name = "DIR")]
    pub tree: PathBuf,
    /// The channel to publish on (lowercase letters, digits, - _ .), like stable or beta.
    #[arg(long, value_name = "NAME", required_unless_present = "trust_set")]
    pub channel: Option<String>,
    /// The secret key that signs the channel's feed and the audit ledger's tree head.
    #[arg(long, value_name = "SECRET.pem")]
    pub key: PathBuf,
    /// A key that signs the audit ledger's tree head besides the feed key (repeat for
    /// several), for devices whose trust set needs more than one tree-head signature.
    #[arg(long, value_name = "SECRET.pem")]
    pub tree_head_key: Vec<PathBuf>,
    /// A command that signs the ledger's tree head outside this process, so the tree-head key
    /// never comes here (run with `sh -c`): it reads the bytes to sign on stdin and writes the
    /// raw 64-byte Ed25519 signature on stdout, like `openssl pkeyutl -sign -rawin`; the entry
    /// is in $AMPOULE_LEDGER_ENTRY. Repeat for several signers, each with its own
    /// --tree-head-signer-key, paired in the order given.
    #[arg(long, value_name = "COMMAND", requires = "tree_head_signer_key")]
    pub tree_head_signer: Vec<String>,
    /// The public key a --tree-head-signer's signatures must verify under (one per signer,
    /// in the same order).
    #[arg(long, value_name = "PUB.pem", requires = "tree_head_signer")]
    pub tree_head_signer_key: Vec<PathBuf>,
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
    /// How long to wait for another publish or withdraw on the same tree to finish, in
    /// seconds (0: fail at once).
    #[arg(long, value_name = "SECONDS", default_value_t = 60)]
    pub lock_wait: u64,
    /// The base URL of a copy of this tree (repeat for several); the feed lists the bundle
    /// there too, tried in order after the tree itself.
    #[arg(long, value_name = "URL")]
    pub mirror: Vec<String>,
    /// Make deltas to this release from the channel's last N earlier releases of the same
    /// bundle name (0 to 8; 0: none), written beside the bundles as
    /// bundles/<sha256>.ampoule-delta and listed in the feed and the ledger. A delta is kept
    /// only if it is at most 3/4 of the bundle. Renewing the current release offers its
    /// deltas again (at most N).
    #[arg(long, value_name = "N", default_value_t = 3)]
    pub deltas: usize,
    /// Make every check and show the sequence, release, rollout and ledger entry the publish
    /// would write, and write nothing.
    #[arg(long)]
    pub dry_run: bool,
}

#[derive(Args, Debug)]
pub struct WithdrawArgs {
    /// The release tree.
    #[arg(long, value_name = "DIR")]
    pub tree: PathBuf,
    /// The channel whose current release is pulled.
    #[arg(long, value_name = "NAME")]
    pub channel: String,
    /// The version to pull: the channel's current release (required, so that a rerun never
    /// pulls the release before it too; a version already pulled changes nothing).
    #[arg(long, value_name = "VERSION")]
    pub version: Option<String>,
    /// Make every check and show the sequence, release and ledger entry the withdraw would
    /// write, and write nothing.
    #[arg(long)]
    pub dry_run: bool,
    /// The secret key that signs the channel's feed and the audit ledger's tree head.
    #[arg(long, value_name = "SECRET.pem")]
    pub key: PathBuf,
    /// A key that signs the audit ledger's tree head besides the feed key (repeat for
    /// several), for devices whose trust set needs more than one tree-head signature.
    #[arg(long, value_name = "SECRET.pem")]
    pub tree_head_key: Vec<PathBuf>,
    /// A command that signs the ledger's tree head outside this process, so the tree-head key
    /// never comes here (run with `sh -c`): it reads the bytes to sign on stdin and writes the
    /// raw 64-byte Ed25519 signature on stdout, like `openssl pkeyutl -sign -rawin`; the entry
    /// is in $AMPOULE_LEDGER_ENTRY. Repeat for several signers, each with its own
    /// --tree-head-signer-key, paired in the order given.
    #[arg(long, value_name = "COMMAND", requires = "tree_head_signer_key")]
    pub tree_head_signer: Vec<String>,
    /// The public key a --tree-head-signer's signatures must verify under (one per signer,
    /// in the same order).
    #[arg(long, value_name = "PUB.pem", requires = "tree_head_signer")]
    pub tree_head_signer_key: Vec<PathBuf>,
    #[command(flatten)]
    pub passphrase: PassphraseArgs,
    /// How long the new feed stays valid (like 7d, 12h, 90m).
    #[arg(long, value_name = "DURATION", default_value = "7d")]
    pub expires_in: String,
    /// How long to wait for another publish or withdraw on the same tree to finish, in
    /// seconds (0: fail at once).
    #[arg(long, value_name = "SECONDS", default_value_t = 60)]
    pub lock_wait: u64,
}

#[derive(Args, Debug)]
pub struct OfflineArgs {
    /// The release tree to take the channel's current feed and files from.
    #[arg(long, value_name = "DIR")]
    pub tree: PathBuf,
    /// The channel whose current feed the file carries.
    #[arg(long, value_name = "NAME")]
    pub channel: String,
    /// The offline file to write (.ampoule-offline); it must not exist yet.
    #[arg(short = 'o', long = "out", value_name = "OUT.ampoule-offline")]
    pub out: PathBuf,
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

#[derive(Args, Debug)]
pub struct UpdateArgs {
    /// The on-device store (created if missing).
    #[arg(long, value_name = "DIR")]
    pub store: PathBuf,
    /// The URL of the channel's feed, like http://HOST/feeds/stable.json.
    #[arg(long, value_name = "URL", required_unless_present = "offline")]
    pub feed: Option<String>,
    /// Update from this offline file (made by `ampoule offline`) instead of --feed: every
    /// check but the feed's expiry, which cannot be judged without a network.
    #[arg(long, value_name = "FILE", conflicts_with = "feed")]
    pub offline: Option<PathBuf>,
    /// A public key trusted for every role: bundles, feeds and the audit ledger's tree heads
    /// (repeat for several). With separate release and feed keys, use --trust-bundle and
    /// --trust-feed instead.
    #[arg(
        long,
        value_name = "PUB.pem",
        required_unless_present_any = ["trust_set", "trust_bundle", "trust_feed"]
    )]
    pub trust: Vec<PathBuf>,
    /// A public key trusted for bundles only: the release key (repeat for several).
    #[arg(long, value_name = "PUB.pem", conflicts_with = "trust_set")]
    pub trust_bundle: Vec<PathBuf>,
    /// A public key trusted for feeds and the audit ledger's tree heads only: the feed key
    /// that `publish --key` signs with (repeat for several). It is not trusted for bundles.
    #[arg(long, value_name = "PUB.pem", conflicts_with = "trust_set")]
    pub trust_feed: Vec<PathBuf>,
    /// Run on trust sets, starting from this one (the set shipped with the app) or the newer
    /// one the store kept; a newer set the feed names is taken and kept in the store.
    #[arg(long, value_name = "TRUST.json", conflicts_with = "trust")]
    pub trust_set: Option<PathBuf>,
    /// The app's own version: bundles must allow it.
    #[arg(long, value_name = "X")]
    pub app_version: String,
    /// The id that places this device in rollouts (default: the one kept in the store).
    #[arg(long, value_name = "ID")]
    pub device_id: Option<String>,
    /// The channel the device follows (default: the feed file's name without .json).
    #[arg(long, value_name = "NAME")]
    pub channel: Option<String>,
    /// Accept only bundles with this name (default: the store's model line, once it has one).
    #[arg(long)]
    pub name: Option<String>,
    /// The largest bundle to download, and the most bytes it may unpack to.
    #[arg(long, value_name = "BYTES")]
    pub max_size: Option<u64>,
    /// Accept feeds that carry no audit-ledger proof (release trees made before the ledger
    /// existed). Without the ledger, a bundle signed with a stolen key but never published
    /// would be installed; do not use this on devices in the field.
    #[arg(long)]
    pub dangerous_skip_ledger: bool,
    /// Make the store follow --channel (or the feed's channel) from now on, when it followed
    /// another one. The highest version it accepted stays, so nothing older installs.
    #[arg(long)]
    pub switch_channel: bool,
    #[command(flatten)]
    pub require_meta: RequireMetaArgs,
}

#[derive(Args, Debug)]
pub struct StoreArgs {
    #[command(subcommand)]
    pub command: StoreCommand,
}

#[derive(Subcommand, Debug)]
pub enum StoreCommand {
    /// The current release (fully checked), the previous one, and what the store remembers.
    #[command(after_help = "Examples:
  ampoule store status --store ./camera --trust release.public.pem \\
      --app-version 2.3.0
  ampoule store status --store ./camera --trust-set trust-1.json \\
      --app-version 2.3.0 --json")]
    Status(StoreOptions),
    /// Make the previous release current again (after the app's health check failed).
    #[command(after_help = "Example:
  ampoule store rollback --store ./camera --trust release.public.pem \\
      --app-version 2.3.0

The version rolled back from stays refused, and so does anything not newer than it.")]
    Rollback(StoreOptions),
    /// Remove releases other than the current and previous ones, and leftovers of crashes.
    #[command(after_help = "Example:
  ampoule store gc --store ./camera --trust release.public.pem \\
      --app-version 2.3.0")]
    Gc(StoreOptions),
}

/// Which store, and the app whose keys and version it is opened with.
#[derive(Args, Debug)]
pub struct StoreOptions {
    /// The on-device store.
    #[arg(long, value_name = "DIR")]
    pub store: PathBuf,
    /// A public key trusted for bundles (repeat for several); the store checks bundles only.
    #[arg(
        long,
        visible_alias = "trust-bundle",
        value_name = "PUB.pem",
        required_unless_present = "trust_set"
    )]
    pub trust: Vec<PathBuf>,
    /// The trust set shipped with the app (the store's newer one is used when it has one).
    #[arg(long, value_name = "TRUST.json", conflicts_with = "trust")]
    pub trust_set: Option<PathBuf>,
    /// The app's own version.
    #[arg(long, value_name = "X")]
    pub app_version: String,
}
