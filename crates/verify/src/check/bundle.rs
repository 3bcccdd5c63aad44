//! The verifier: the checks a bundle must pass, in the order that keeps untrusted bytes away
//! from anything large or complex, and the [`VerifiedBundle`] that proves they passed.
//!
//! Order: outer size cap; layout with capped manifest, signatures and chunk list; signature by
//! a trusted key over the exact manifest bytes; strict manifest parse; the app's policy; what
//! binds the compressed payload: in format 2 the chunk list's SHA-256 (each chunk's own is
//! checked just before the decoder sees it, see [`crate::format::chunks`]), in format 1 the
//! whole payload's SHA-256. Only then may the payload be decompressed (see
//! [`crate::payload::unpack`]), and its files are checked against their own digests as they
//! stream out.

use std::fmt;
use std::fs::File;
use std::io::{self, Read, Seek, SeekFrom};
use std::path::Path;

use semver::Version;

use crate::check::policy::CompatibilityPolicy;
use crate::check::trust::TrustSet;
use crate::error::{Error, ErrorKind, Result};
use crate::format::bundle::{self, Layout};
use crate::format::chunks;
use crate::format::keys::{KeyId, TrustedKeys};
use crate::format::manifest::Manifest;
use crate::format::signature::{SignatureReport, Signatures};
use crate::format::signed::{SignedDocument, Signers, kind};
use crate::progress::ProgressFn;

/// The largest bundle file accepted unless the app sets its own limit.
pub const DEFAULT_MAX_BUNDLE_BYTES: u64 = 1024 * 1024 * 1024;
/// The most bytes a bundle may unpack to unless the app sets its own limit.
pub const DEFAULT_MAX_UNPACKED_BYTES: u64 = 4 * 1024 * 1024 * 1024;

/// What [`Verifier::check_head`] proved about a bundle still being downloaded.
pub(crate) struct CheckedHead {
    /// The signed manifest, and its exact bytes.
    pub manifest: Manifest,
    pub manifest_bytes: Vec<u8>,
    /// The bundle's exact length, which the bundle signers thereby fixed: a feed that states
    /// another size is not telling the truth about this bundle.
    pub len: u64,
    /// Format 2: the payload's chunks where they lie in the file, to check the rest of the
    /// download chunk by chunk as it arrives.
    pub watch: Option<chunks::Watch>,
}

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

    /// The app's compatibility policy, for the checks of files a delta rebuilt.
    pub(crate) fn compatibility_policy(&self) -> Option<&CompatibilityPolicy> {
        self.compatibility.as_ref()
    }

    /// Opens and verifies the bundle at `path`.
    pub fn verify_path(&self, path: &Path) -> Result<VerifiedBundle> {
        let file = File::open(path)
            .map_err(|e| Error::io(format!("cannot open bundle {}", path.display()), e))?;
        self.verify_file(file)
    }

    /// Verifies an open bundle file. The file stays open inside the result, so what is
    /// unpacked later is the file that was verified, even if the path is replaced meanwhile.
    ///
    /// A format 2 bundle's payload is read once, when it is unpacked or its contents
    /// checked: each chunk is hashed and compared with the signed chunk list just before it
    /// is decoded. A format 1 bundle's payload is hashed whole here, before anything else.
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
        bundle::check_before_decoding(&mut file, &layout, &manifest, self.progress.as_ref())?;
        Ok(VerifiedBundle {
            file,
            layout,
            manifest,
            report,
            compatibility: self.compatibility.clone(),
            progress: self.progress.clone(),
        })
    }

    /// Checks the head of a bundle still being downloaded (the first bytes of `file`, at most
    /// [`crate::format::limit::HEAD_BYTES`]): the manifest's signatures, as
    /// [`Verifier::verify_file`] checks them, and that the payload's tar header states the
    /// payload size the signed manifest declares. The app's policy is
    /// [`Verifier::check_head_policy`].
    pub(crate) fn check_head(&self, file: &mut File) -> Result<CheckedHead> {
        file.seek(SeekFrom::Start(0))
            .map_err(|e| Error::io("cannot read the bundle's head", e))?;
        let head = bundle::read_head(&mut io::BufReader::new(Read::take(
            &mut *file,
            crate::format::limit::HEAD_BYTES,
        )))?;
        let signatures = Signatures::from_json(&head.signatures)?;
        SignedDocument::<kind::Manifest>::new(&head.manifest, &signatures.signatures)?
            .check(&self.signers, "bundle")?;
        let manifest = Manifest::from_json(&head.manifest)?;
        if head.payload_len != manifest.payload.size {
            return Err(Error::new(
                ErrorKind::Malformed,
                format!(
                    "bundle's payload entry is {} bytes but its signed manifest declares {}",
                    head.payload_len, manifest.payload.size
                ),
            ));
        }
        // Format 2: the chunk list is in the head, so a download is refused before its
        // payload if the list does not match the signed manifest.
        bundle::check_binding(head.payload_len, head.chunks.as_deref(), &manifest)?;
        let len = head.bundle_len().ok_or_else(|| {
            Error::new(
                ErrorKind::Malformed,
                "bundle's length overflows a 64-bit count",
            )
        })?;
        let watch = match &head.chunks {
            Some(list) => Some(chunks::Watch::new(
                head.payload_offset,
                &chunks::Plan::new(list, &manifest)?,
            )),
            None => None,
        };
        Ok(CheckedHead {
            manifest,
            manifest_bytes: head.manifest,
            len,
            watch,
        })
    }

    /// The app's policy on a head [`Verifier::check_head`] read, and the bundle length it
    /// fixes against the app's limit: the checks [`Verifier::verify_file`] makes before it
    /// reads the payload.
    pub(crate) fn check_head_policy(&self, manifest: &Manifest, len: u64) -> Result<()> {
        self.check_policy(manifest, true)?;
        if len > self.max_bundle_bytes {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "bundle is {len} bytes by its signed manifest, over this app's limit of {} \
                     bytes",
                    self.max_bundle_bytes
                ),
            ));
        }
        Ok(())
    }

    /// Checks only a manifest's signatures (no policy): for the store's proof of its highest
    /// version, which must outlive an app update that changes the policy.
    /// `signers` replaces the verifier's own when given.
    pub(crate) fn check_signed_manifest(
        &self,
        manifest: &[u8],
        signatures: &[u8],
        signers: Option<&Signers<kind::Manifest>>,
    ) -> Result<Manifest> {
        let signatures = Signatures::from_json(signatures)?;
        SignedDocument::<kind::Manifest>::new(manifest, &signatures.signatures)?
            .check(signers.unwrap_or(&self.signers), "manifest")?;
        Manifest::from_json(manifest)
    }

    /// Checks a manifest and signatures a delta carries (issue 13) as
    /// [`Verifier::verify_file`] checks a bundle's, before any patch byte is read: the
    /// signatures by trusted keys, then the app's whole policy (name, newer version, app
    /// version, compatibility, unpacked size).
    pub(crate) fn check_carried(
        &self,
        manifest: &[u8],
        signatures: &[u8],
    ) -> Result<(Manifest, SignatureReport)> {
        let signatures = Signatures::from_json(signatures)?;
        let report = SignedDocument::<kind::Manifest>::new(manifest, &signatures.signatures)?
            .check(&self.signers, "delta's manifest")?;
        let manifest = Manifest::from_json(manifest)?;
        self.check_policy(&manifest, true)?;
        Ok((manifest, report))
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
        if let Some(model) = &m.model {
            model.check_rules()?;
        }
        if let Some(policy) = &self.compatibility {
            policy.check_before_unpack(m.model.as_ref(), m.label_count as usize)?;
            policy.check_metadata(m)?;
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
/// valid, allowed by the app's policy, and the payload bound: in format 1 its whole digest
/// checked, in format 2 its chunk list checked, each chunk then checked as it is read for
/// decoding ([`VerifiedBundle::check_contents`], [`VerifiedBundle::unpack`]), so no
/// unchecked byte ever reaches the decoder. Only this crate can make one.
pub struct VerifiedBundle {
    pub(crate) file: File,
    pub(crate) layout: Layout,
    pub(crate) manifest: Manifest,
    pub(crate) report: SignatureReport,
    pub(crate) compatibility: Option<CompatibilityPolicy>,
    pub(crate) progress: Option<ProgressFn>,
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

    /// The bundle's layout in its file.
    pub(crate) fn layout(&self) -> &Layout {
        &self.layout
    }
}
