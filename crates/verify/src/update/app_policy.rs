//! The app's settings from its policy document (issue 14), so that an app reads the same file
//! as the C interface and the CLI's `--policy` instead of calling the builders one by one.

use crate::check::policy_document::PolicyDocument;
use crate::error::Result;

use super::App;

impl App {
    /// Takes the compatibility policy, the bundle name and the size limits that the app's
    /// policy document states (FORMAT.md, "The policy document"); settings the document
    /// leaves out stay as they are. It replaces any policy given before.
    ///
    /// ```
    /// # fn app(trust: ampoule_verify::Trust) -> ampoule_verify::Result<ampoule_verify::App> {
    /// let document = br#"{
    ///   "policy_format": 1,
    ///   "bundle_name": "trailcam-species",
    ///   "model": { "inputs": [{ "name": "image", "dtype": "float32", "shape": "[*, 3, 96, 96]" }] },
    ///   "labels": { "min_count": 2, "required": ["empty frame"] }
    /// }"#;
    /// ampoule_verify::App::new(trust, ampoule_verify::Version::new(2, 3, 0)).policy_document(document)
    /// # }
    /// ```
    ///
    /// # Errors
    ///
    /// [`crate::ErrorKind::Settings`], naming the field, for a document that is not strict
    /// JSON within its caps, repeats or misspells a key, or holds a value of the wrong type.
    pub fn policy_document(self, document: &[u8]) -> Result<App> {
        let document = PolicyDocument::parse(document)?;
        let mut app = self.compatibility(document.compatibility);
        if let Some(name) = document.bundle_name {
            app = app.bundle_name(name)?;
        }
        if let Some(max) = document.max_bundle_bytes {
            app = app.max_bundle_bytes(max);
        }
        if let Some(max) = document.max_unpacked_bytes {
            app = app.max_unpacked_bytes(max);
        }
        Ok(app)
    }
}
