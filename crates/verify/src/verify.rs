//! The verifier: the checks a bundle must pass, in the order that keeps untrusted bytes away
//! from anything large or complex, and the [`VerifiedBundle`] that proves they passed.
//!
//! Order: outer size cap; layout with capped manifest and signatures; signature by a trusted
//! key over the exact manifest bytes; strict manifest parse; the app's policy; the compressed
//! payload's SHA-256. Only then may the payload be decompressed (see [`crate::unpack`]), and
//! its files are checked against their own digests as they stream out.

use std::fmt;
use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use semver::Version;

use crate::bundle::{self, Layout};
use crate::error::{Error, ErrorKind, Result};
use crate::keys::{KeyId, TrustedKeys};
use crate::manifest::Manifest;
use crate::model::CompatibilityPolicy;
use crate::signature::{SignatureReport, Signatures};
use crate::signed::{SignedDocument, Signers, kind};
use crate::trust::TrustSet;

/// The largest bundle file accepted unless the app sets its own limit.
pub const DEFAULT_MAX_BUNDLE_BYTES: u64 = 1024 * 1024 * 1024;
/// The most bytes a bundle may unpack to unless the app sets its own limit.
pub const DEFAULT_MAX_UNPACKED_BYTES: u64 = 4 * 1024 * 1024 * 1024;

/// Which long-running step a progress report is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum Stage {
    /// Hashing the compressed payload.
    HashPayload,
    /// Decompressing and checking (and possibly writing) the payload's files.
    Unpack,
    /// Downloading the bundle file (the `fetch` feature's `Transfer::on_progress`).
    Download,
}

/// A progress report: `done` of `total` bytes of `stage`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Progress {
    /// The step.
    pub stage: Stage,
    /// Bytes done so far.
    pub done: u64,
    /// Bytes the step will take in all.
    pub total: u64,
}

/// A callback for progress reports.
pub type ProgressFn = Arc<dyn Fn(Progress) + Send + Sync>;

/// What the app accepts. Trusted keys and the app's own version are required; everything
/// else has a safe default.
#[derive(Clone)]
pub struct Verifier {
    signers: Signers<kind::Manifest>,
    app_version: Option<Version>,
    name: Option<String>,
    installed: Option<Version>,
    max_bundle_bytes: u64,
    max_unpacked_bytes: u64,
    compatibility: Option<CompatibilityPolicy>,
    progress: Option<ProgressFn>,
}

impl fmt::Debug for Verifier {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Verifier")
            .field("signers", &self.signers)
            .field("app_version", &self.app_version)
            .field("name", &self.name)
            .field("installed", &self.installed)
            .field("max_bundle_bytes", &self.max_bundle_bytes)
            .field("max_unpacked_bytes", &self.max_unpacked_bytes)
            .field("compatibility", &self.compatibility)
            .finish_non_exhaustive()
    }
}

impl Verifier {
    /// A verifier that accepts bundles signed by one of `keys` whose app-version range
    /// contains `app_version`. Refuses an empty key set: nothing could ever verify.
    pub fn new(keys: TrustedKeys, app_version: Version) -> Result<Self> {
        if keys.is_empty() {
            return Err(Error::new(
                ErrorKind::Key,
                "no trusted keys given; a verifier needs at least one public key to check signatures against",
            ));
        }
        Ok(Verifier {
            signers: Signers::new(keys, 1)?,
            app_version: Some(app_version),
            name: None,
            installed: None,
            max_bundle_bytes: DEFAULT_MAX_BUNDLE_BYTES,
            max_unpacked_bytes: DEFAULT_MAX_UNPACKED_BYTES,
            compatibility: None,
            progress: None,
        })
    }

    /// Every check of [`Verifier::new`] except the app-version range; outside the crate
    /// only as [`crate::dangerous::verifier_without_app_version`].
    pub(crate) fn without_app_version(keys: TrustedKeys) -> Result<Self> {
        let mut verifier = Self::new(keys, Version::new(0, 0, 0))?;
        verifier.app_version = None;
        Ok(verifier)
    }

    /// Whether this verifier checks the app-version range (false only for
    /// [`crate::dangerous::verifier_without_app_version`]).
    pub fn checks_app_version(&self) -> bool {
        self.app_version.is_some()
    }

    /// A verifier that takes its bundle keys and threshold from a verified trust set: a
    /// bundle needs that many valid signatures by distinct keys with the bundle role.
    pub fn from_trust_set(trust: &TrustSet, app_version: Version) -> Result<Self> {
        let signers = trust.signers::<kind::Manifest>()?;
        let mut verifier = Self::new(signers.keys().clone(), app_version)?;
        verifier.signers = signers;
        Ok(verifier)
    }

    /// This verifier with the bundle keys and threshold of `trust` instead of its own; every
    /// policy setting stays. For a device that just accepted a newer trust set.
    pub fn with_trust_set(mut self, trust: &TrustSet) -> Result<Self> {
        self.signers = trust.signers::<kind::Manifest>()?;
        Ok(self)
    }

    /// Requires `threshold` valid signatures by distinct trusted keys (1 unless set). Refuses 0,
    /// which would accept unsigned bundles, and more than the number of trusted keys, which
    /// no bundle could ever meet.
    pub fn with_threshold(mut self, threshold: usize) -> Result<Self> {
        self.signers = Signers::new(self.signers.keys().clone(), threshold)?;
        Ok(self)
    }

    /// How many valid signatures by distinct trusted keys a bundle needs.
    pub fn threshold(&self) -> usize {
        self.signers.threshold()
    }

    /// Accept only bundles with this name (the model line the app runs).
    pub fn require_name(mut self, name: impl Into<String>) -> Self {
        self.name = Some(name.into());
        self
    }

    /// The version installed now: only a strictly newer bundle is accepted (SemVer
    /// precedence, so build metadata alone never makes a bundle newer).
    pub fn installed(mut self, version: Version) -> Self {
        self.installed = Some(version);
        self
    }

    /// The largest bundle file to read at all.
    pub fn max_bundle_bytes(mut self, bytes: u64) -> Self {
        self.max_bundle_bytes = bytes;
        self
    }

    /// The most bytes the model and labels may take once unpacked.
    pub fn max_unpacked_bytes(mut self, bytes: u64) -> Self {
        self.max_unpacked_bytes = bytes;
        self
    }

    /// What the app's code needs of the model and labels: tensor names, dtypes and shapes,
    /// label count, required labels. Checked before the payload is read, and the required
    /// labels once the label list is unpacked, always before anything takes its place.
    pub fn compatibility(mut self, policy: CompatibilityPolicy) -> Self {
        self.compatibility = Some(policy);
        self
    }

    /// Calls `progress` during the long steps (hashing, unpacking).
    pub fn on_progress(mut self, progress: ProgressFn) -> Self {
        self.progress = Some(progress);
        self
    }

    /// The app version bundles are checked against (`None` only for
    /// [`crate::dangerous::verifier_without_app_version`]).
    pub fn app_version(&self) -> Option<&Version> {
        self.app_version.as_ref()
    }

    /// The installed version, if set: only a newer bundle is accepted.
    pub fn installed_version(&self) -> Option<&Version> {
        self.installed.as_ref()
    }

    /// The only bundle name accepted, if set.
    pub fn required_name(&self) -> Option<&str> {
        self.name.as_deref()
    }

    /// The trusted keys.
    pub fn keys(&self) -> &TrustedKeys {
        self.signers.keys()
    }

    /// Opens and verifies the bundle at `path`.
    pub fn verify_path(&self, path: &Path) -> Result<VerifiedBundle> {
        let file = File::open(path)
            .map_err(|e| Error::io(format!("cannot open bundle {}", path.display()), e))?;
        self.verify_file(file)
    }

    /// Verifies an open bundle file. The file stays open inside the result, so what is
    /// unpacked later is the file that was verified, even if the path is replaced meanwhile.
    pub fn verify_file(&self, mut file: File) -> Result<VerifiedBundle> {
        let file_len = file
            .metadata()
            .map_err(|e| Error::io("cannot read the bundle's size", e))?
            .len();
        if file_len > self.max_bundle_bytes {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "bundle is {file_len} bytes, over this app's limit of {} bytes",
                    self.max_bundle_bytes
                ),
            ));
        }
        let layout = bundle::read_layout(&mut file, file_len)?;
        let signatures = Signatures::from_json(&layout.signatures)?;
        let report =
            SignedDocument::<kind::Manifest>::new(&layout.manifest, &signatures.signatures)?
                .check(&self.signers, "bundle")?;
        let manifest = Manifest::from_json(&layout.manifest)?;
        self.check_policy(&manifest, true)?;
        bundle::check_payload(&mut file, &layout, &manifest, self.progress.as_ref())?;
        Ok(VerifiedBundle {
            file,
            layout,
            manifest,
            report,
            compatibility: self.compatibility.clone(),
            progress: self.progress.clone(),
        })
    }

    /// Re-checks a manifest and its signatures kept in the on-device store: the same
    /// signature and policy checks as [`Verifier::verify_file`], except the installed-version
    /// rule, which the store enforces itself from its own state.
    pub(crate) fn check_stored(
        &self,
        what: &str,
        manifest: &[u8],
        signatures: &[u8],
    ) -> Result<(Manifest, SignatureReport)> {
        let signatures = Signatures::from_json(signatures)?;
        let report = SignedDocument::<kind::Manifest>::new(manifest, &signatures.signatures)?
            .check(&self.signers, what)?;
        let manifest = Manifest::from_json(manifest)?;
        self.check_policy(&manifest, false)?;
        Ok((manifest, report))
    }

    fn check_policy(&self, m: &Manifest, check_installed: bool) -> Result<()> {
        let refuse = |message: String| Err(Error::new(ErrorKind::Policy, message));
        if let Some(name) = &self.name
            && &m.name != name
        {
            return refuse(format!(
                "bundle is named '{}' but this app accepts only '{name}'",
                m.name
            ));
        }
        if let Some(installed) = self.installed.as_ref().filter(|_| check_installed)
            && m.version.cmp_precedence(installed) != std::cmp::Ordering::Greater
        {
            return refuse(format!(
                "bundle version {} is not newer than the installed version {installed}; \
                 refusing a downgrade or reinstall",
                m.version
            ));
        }
        if let Some(app) = &self.app_version
            && !m.requires_app.matches(app)
        {
            return refuse(format!(
                "bundle requires app version {} but this app is {app}",
                m.requires_app
            ));
        }
        if let Some(policy) = &self.compatibility {
            policy.check_before_unpack(m.model.as_ref(), m.label_count as usize)?;
        }
        if m.files_len() > self.max_unpacked_bytes {
            return refuse(format!(
                "bundle unpacks to {} bytes, over this app's limit of {} bytes",
                m.files_len(),
                self.max_unpacked_bytes
            ));
        }
        Ok(())
    }
}

/// A bundle that passed every check before decompression: signed by trusted keys, manifest
/// valid, allowed by the app's policy, payload digest correct. Only this crate can make one.
pub struct VerifiedBundle {
    file: File,
    layout: Layout,
    manifest: Manifest,
    report: SignatureReport,
    compatibility: Option<CompatibilityPolicy>,
    progress: Option<ProgressFn>,
}

impl fmt::Debug for VerifiedBundle {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("VerifiedBundle")
            .field("name", &self.manifest.name)
            .field("version", &self.manifest.version)
            .field("signers", &self.report.valid)
            .finish_non_exhaustive()
    }
}

impl VerifiedBundle {
    /// The verified manifest.
    pub fn manifest(&self) -> &Manifest {
        &self.manifest
    }

    /// The manifest's exact signed bytes.
    pub fn manifest_bytes(&self) -> &[u8] {
        &self.layout.manifest
    }

    /// The trusted keys whose signatures verified.
    pub fn signers(&self) -> &[KeyId] {
        &self.report.valid
    }

    /// The whole signature check, including signatures that did not count.
    pub fn signature_report(&self) -> &SignatureReport {
        &self.report
    }

    /// Decompresses the payload and checks every file's size and digest without writing
    /// anything. Memory stays bounded whatever the model's size.
    pub fn check_contents(&mut self) -> Result<Vec<String>> {
        let labels = crate::unpack::stream(&self.source(), None)?;
        self.check_labels(&labels)?;
        Ok(labels)
    }

    /// The bundle's layout in its file.
    pub(crate) fn layout(&self) -> &Layout {
        &self.layout
    }

    /// Decompresses into `dir`, an existing empty staging directory, with every check that
    /// [`VerifiedBundle::unpack`] makes before its rename. For the store, which stages and
    /// renames on its own.
    pub(crate) fn unpack_into_staging(&self, dir: &Path) -> Result<Vec<String>> {
        let labels = crate::unpack::stream(&self.source(), Some(dir))?;
        self.last_checks(&labels, dir)?;
        Ok(labels)
    }

    /// The checks that need the unpacked files: required labels, and the model's signature.
    fn last_checks(&self, labels: &[String], staged: &Path) -> Result<()> {
        self.check_labels(labels)?;
        self.check_model_signature(staged)
    }

    fn check_labels(&self, labels: &[String]) -> Result<()> {
        match &self.compatibility {
            Some(policy) => policy.check_required_labels(labels),
            None => Ok(()),
        }
    }

    /// Reads the unpacked model's signature again and requires it to be the one the signed
    /// manifest records, so a manifest cannot describe a different model than it ships.
    fn check_model_signature(&self, dir: &Path) -> Result<()> {
        if self.manifest.model.is_none() {
            // Packed as opaque: the manifest makes no claim about the model's structure.
            return Ok(());
        }
        let model = self.manifest.model();
        let found = crate::model::read_model_signature_file(&dir.join(&model.path))?;
        if found != self.manifest.model {
            return Err(Error::new(
                ErrorKind::Manifest,
                format!(
                    "{} does not have the model signature its manifest records; the bundle was packed wrongly",
                    model.path
                ),
            ));
        }
        Ok(())
    }

    fn source(&self) -> crate::unpack::Source<'_> {
        crate::unpack::Source {
            file: &self.file,
            payload_offset: self.layout.payload_offset,
            manifest: &self.manifest,
            progress: self.progress.as_ref(),
        }
    }

    /// Unpacks the model and labels into the new directory `dest`, which must not exist.
    /// Files are written into a fresh staging directory beside it and checked as they stream;
    /// only when every check passed is the staging directory renamed to `dest`. On any
    /// failure nothing is left behind.
    pub fn unpack(self, dest: &Path) -> Result<Unpacked> {
        let labels = crate::unpack::unpack_to(&self.source(), dest, &|labels, staged| {
            self.last_checks(labels, staged)
        })?;
        Ok(Unpacked {
            model: dest.join(&self.manifest.model().path),
            labels_path: dest.join(&self.manifest.labels().path),
            dir: dest.to_path_buf(),
            labels,
            manifest: self.manifest,
        })
    }
}

/// A verified bundle's files, unpacked and checked.
#[derive(Debug, Clone)]
pub struct Unpacked {
    /// The directory holding the files.
    pub dir: PathBuf,
    /// The model file.
    pub model: PathBuf,
    /// The label list file.
    pub labels_path: PathBuf,
    /// The labels, in output-index order.
    pub labels: Vec<String>,
    /// The verified manifest.
    pub manifest: Manifest,
}
