//! The app's compatibility policy: what its code expects of a model and a label list.
//!
//! A valid signature proves who made a bundle, not that it fits the code that will run it. The
//! app states the inputs it feeds and the outputs it reads (names, dtypes, shapes with wildcards
//! for batch or any dimension), the label counts it handles and the labels it relies on; a
//! bundle whose recorded [`ModelSignature`] does not fit is refused before any swap, and the
//! message names the tensor and dimension that differ.

use std::fmt;
use std::ops::RangeInclusive;
use std::str::FromStr;

use crate::error::{Error, ErrorKind, Result};
use crate::format::manifest::Manifest;
use crate::format::metadata::{parse_key, same_value, shown_value};

use crate::format::model::{
    DType, Dim, ModelFormat, ModelSignature, ShapeDisplay, ValueKind, ValueSignature, name_list,
};

fn incompatible(message: String) -> Error {
    Error::new(ErrorKind::Incompatible, message)
}

/// One dimension the app expects.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum DimPattern {
    /// Any size: fixed, named or unknown (a batch dimension, or one the code adapts to).
    Any,
    /// Exactly this size, fixed in the model. A named or unknown dimension does not match:
    /// the model does not promise the size.
    Exactly(u64),
}

impl fmt::Display for DimPattern {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            DimPattern::Any => f.write_str("*"),
            DimPattern::Exactly(size) => write!(f, "{size}"),
        }
    }
}

impl From<u64> for DimPattern {
    fn from(size: u64) -> Self {
        DimPattern::Exactly(size)
    }
}

/// A shape the app expects: a rank and a pattern per dimension. Written `[*, 3, 96, 96]`.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub struct ShapePattern(Vec<DimPattern>);

impl ShapePattern {
    pub_for_release! {
        /// A pattern of these dimensions.
        fn new(dims: impl IntoIterator<Item = DimPattern>) -> Self {
            ShapePattern(dims.into_iter().collect())
        }
    }

    pub_for_release! {
        /// The dimensions.
        fn dims(&self) -> &[DimPattern] {
            &self.0
        }
    }

    /// Why `shape` does not fit, if it does not.
    fn mismatch(&self, shape: &[Dim]) -> Option<String> {
        if shape.len() != self.0.len() {
            return Some(format!("rank {}, not {}", shape.len(), self.0.len()));
        }
        for (index, (dim, pattern)) in shape.iter().zip(&self.0).enumerate() {
            match (pattern, dim) {
                (DimPattern::Any, _) => {}
                (DimPattern::Exactly(want), Dim::Fixed(have)) if want == have => {}
                (DimPattern::Exactly(want), Dim::Fixed(have)) => {
                    return Some(format!("dimension {index} is {have}, not {want}"));
                }
                (DimPattern::Exactly(want), Dim::Symbolic(name)) => {
                    return Some(format!(
                        "dimension {index} is named {name} (not fixed), not {want}"
                    ));
                }
                (DimPattern::Exactly(want), Dim::Unknown) => {
                    return Some(format!("dimension {index} is unknown, not {want}"));
                }
            }
        }
        None
    }
}

impl fmt::Display for ShapePattern {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("[")?;
        for (i, dim) in self.0.iter().enumerate() {
            if i > 0 {
                f.write_str(", ")?;
            }
            write!(f, "{dim}")?;
        }
        f.write_str("]")
    }
}

impl FromStr for ShapePattern {
    type Err = Error;

    /// Parses `[*, 3, 96, 96]` (brackets optional; `[]` is a scalar).
    fn from_str(text: &str) -> Result<Self> {
        let trimmed = text.trim();
        let inner = trimmed
            .strip_prefix('[')
            .and_then(|rest| rest.strip_suffix(']'))
            .unwrap_or(trimmed)
            .trim();
        if inner.is_empty() {
            return Ok(ShapePattern(Vec::new()));
        }
        let mut dims = Vec::new();
        for part in inner.split(',') {
            let part = part.trim();
            if part == "*" {
                dims.push(DimPattern::Any);
            } else if !part.is_empty() && part.bytes().all(|b| b.is_ascii_digit()) {
                let size = part.parse::<u64>().map_err(|_| {
                    Error::new(
                        ErrorKind::Policy,
                        format!("shape pattern '{text}' has a dimension '{part}' too large"),
                    )
                })?;
                dims.push(DimPattern::Exactly(size));
            } else {
                return Err(Error::new(
                    ErrorKind::Policy,
                    format!(
                        "shape pattern '{text}' has a dimension '{part}' that is neither '*' nor a whole number"
                    ),
                ));
            }
        }
        Ok(ShapePattern(dims))
    }
}

/// A dense tensor the app feeds or reads by name, with the dtype and shape its code handles.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TensorSpec {
    name: String,
    dtype: Option<DType>,
    shape: Option<ShapePattern>,
}

impl TensorSpec {
    /// A tensor of this name, of any dtype and shape until [`TensorSpec::dtype`] and
    /// [`TensorSpec::shape`] narrow it.
    pub fn new(name: impl Into<String>) -> Self {
        TensorSpec {
            name: name.into(),
            dtype: None,
            shape: None,
        }
    }

    /// Requires this element type, named as the manifest's model object names it
    /// (`float32`, `float16`, `int8`, `uint8`, ...).
    ///
    /// # Errors
    ///
    /// [`crate::ErrorKind::Settings`] for a name that is no element type.
    pub fn dtype(mut self, name: &str) -> Result<Self> {
        let dtype = DType::from_name(name).ok_or_else(|| {
            crate::error::Error::new(
                crate::error::ErrorKind::Settings,
                format!(
                    "'{}' is not a tensor element type; use a name such as float32, float16, \
                     int8 or uint8",
                    name.chars().take(40).collect::<String>().escape_debug()
                ),
            )
        })?;
        self.dtype = Some(dtype);
        Ok(self)
    }

    /// Requires a shape that fits this pattern.
    pub fn shape(mut self, shape: ShapePattern) -> Self {
        self.shape = Some(shape);
        self
    }

    pub_for_release! {
        /// The tensor's name.
        fn name(&self) -> &str {
            &self.name
        }
    }

    fn check(&self, role: &str, value: &ValueSignature) -> Result<()> {
        let name = &value.name;
        if value.kind != ValueKind::Tensor {
            return Err(incompatible(format!(
                "{role} '{name}' is a {}, the app expects a tensor",
                value.kind.name()
            )));
        }
        if let Some(want) = self.dtype {
            match value.dtype {
                Some(have) if have == want => {}
                Some(have) => {
                    return Err(incompatible(format!(
                        "{role} '{name}' has dtype {have}, the app expects {want}"
                    )));
                }
                None => {
                    return Err(incompatible(format!(
                        "{role} '{name}' has no recorded dtype, the app expects {want}"
                    )));
                }
            }
        }
        if let Some(want) = &self.shape {
            let Some(have) = value.shape.as_deref() else {
                return Err(incompatible(format!(
                    "{role} '{name}' has no recorded shape, the app expects {want}"
                )));
            };
            if let Some(why) = want.mismatch(have) {
                return Err(incompatible(format!(
                    "{role} '{name}' has shape {}, the app expects {want}: {why}",
                    ShapeDisplay(have)
                )));
            }
        }
        Ok(())
    }
}

/// What the app's code expects of a model and its label list; see the module documentation.
///
/// ```
/// use ampoule_verify::{CompatibilityPolicy, TensorSpec};
///
/// let policy = CompatibilityPolicy::builder()
///     .input(TensorSpec::new("image").dtype("float32")?.shape("[*, 3, 96, 96]".parse()?))
///     .output(TensorSpec::new("species").dtype("float32")?.shape("[*, 7]".parse()?))
///     .classifier_output("species")
///     .label_count(2..=64)
///     .require_label("empty frame")
///     .build()?;
/// # let _ = policy;
/// # Ok::<(), ampoule_verify::Error>(())
/// ```
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct CompatibilityPolicy {
    format: Option<ModelFormat>,
    max_opset: Option<u64>,
    inputs: Vec<TensorSpec>,
    outputs: Vec<TensorSpec>,
    weights_8bit: Option<bool>,
    label_count: Option<RangeInclusive<usize>>,
    required_labels: Vec<String>,
    classifier_output: Option<String>,
    class_dim: Option<u32>,
    required_metadata: Vec<(String, serde_json::Value)>,
}

impl CompatibilityPolicy {
    /// Starts a policy that expects nothing; each builder call adds one expectation.
    pub fn builder() -> CompatibilityPolicyBuilder {
        CompatibilityPolicyBuilder {
            policy: CompatibilityPolicy {
                format: None,
                max_opset: None,
                inputs: Vec::new(),
                outputs: Vec::new(),
                weights_8bit: None,
                label_count: None,
                required_labels: Vec::new(),
                classifier_output: None,
                class_dim: None,
                required_metadata: Vec::new(),
            },
        }
    }

    fn needs_signature(&self) -> bool {
        self.format.is_some()
            || self.max_opset.is_some()
            || !self.inputs.is_empty()
            || !self.outputs.is_empty()
            || self.weights_8bit.is_some()
            || self.classifier_output.is_some()
    }

    pub_for_release! {
        /// Checks a bundle's recorded model signature (`None` for an opaque model) and its label
        /// list against the policy; the error names the first thing that differs.
        ///
        /// Inputs: every input the app feeds must exist and fit, and the model must need no input
        /// the app does not feed. Outputs: every output the app reads must exist and fit; others
        /// are ignored. Labels: the count range, the required labels, and one label per class of
        /// the classifier output when one is named.
        fn check<S: AsRef<str>>(
            &self,
            signature: Option<&ModelSignature>,
            labels: &[S],
        ) -> Result<()> {
            self.check_before_unpack(signature, labels.len())?;
            self.check_required_labels(labels)
        }
    }

    pub_for_release! {
        /// The part of [`CompatibilityPolicy::check`] that needs only the manifest: the model
        /// signature, the label count range and one label per class of the classifier output.
        /// The verifier runs it before it reads the payload, so an incompatible bundle costs no
        /// decompression.
        fn check_before_unpack(
            &self,
            signature: Option<&ModelSignature>,
            label_count: usize,
        ) -> Result<()> {
            match signature {
                Some(signature) => self.check_signature(signature)?,
                None if self.needs_signature() => {
                    return Err(incompatible(
                        "the model is opaque (it has no recorded signature), but the app's policy states what the model must be".into(),
                    ));
                }
                None => {}
            }
            self.check_label_count(label_count)?;
            if let (Some(output), Some(signature)) = (&self.classifier_output, signature) {
                signature.check_label_count(Some(output), self.class_dim, label_count)?;
            }
            Ok(())
        }
    }

    fn check_signature(&self, signature: &ModelSignature) -> Result<()> {
        if let Some(want) = self.format
            && signature.format != want
        {
            return Err(incompatible(format!(
                "the model is {}, the app expects {want}",
                signature.format
            )));
        }
        if let Some(max) = self.max_opset {
            match signature.opset {
                Some(opset) if opset <= max => {}
                Some(opset) => {
                    return Err(incompatible(format!(
                        "the model needs onnx opset {opset}, the app supports at most {max}"
                    )));
                }
                None => {
                    return Err(incompatible(format!(
                        "the model states no onnx opset, the app supports at most {max}"
                    )));
                }
            }
        }
        if !self.inputs.is_empty() {
            for spec in &self.inputs {
                let value = signature.input(&spec.name).ok_or_else(|| {
                    incompatible(format!(
                        "the model has no input '{}' (its inputs: {})",
                        spec.name,
                        name_list(&signature.inputs)
                    ))
                })?;
                spec.check("input", value)?;
            }
            if let Some(extra) = signature
                .inputs
                .iter()
                .find(|value| !self.inputs.iter().any(|spec| spec.name == value.name))
            {
                let fed: Vec<String> = self
                    .inputs
                    .iter()
                    .map(|s| format!("'{}'", s.name))
                    .collect();
                return Err(incompatible(format!(
                    "the model needs input '{}', which the app does not feed (it feeds {})",
                    extra.name,
                    fed.join(", ")
                )));
            }
        }
        for spec in &self.outputs {
            let value = signature.output(&spec.name).ok_or_else(|| {
                incompatible(format!(
                    "the model has no output '{}' (its outputs: {})",
                    spec.name,
                    name_list(&signature.outputs)
                ))
            })?;
            spec.check("output", value)?;
        }
        if let Some(want) = self.weights_8bit
            && signature.weights_8bit != want
        {
            let describe = |eight: bool| if eight { "8-bit" } else { "not 8-bit" };
            return Err(incompatible(format!(
                "the model's weights are {}, the app expects {} weights",
                describe(signature.weights_8bit),
                describe(want)
            )));
        }
        Ok(())
    }

    fn check_label_count(&self, count: usize) -> Result<()> {
        if let Some(range) = &self.label_count
            && !range.contains(&count)
        {
            let accepted = if range.start() == range.end() {
                format!("exactly {}", range.start())
            } else {
                format!("{} to {}", range.start(), range.end())
            };
            return Err(incompatible(format!(
                "the label list has {count} labels, the app accepts {accepted}"
            )));
        }
        Ok(())
    }

    pub_for_release! {
        /// Checks that the manifest's signed metadata holds every value the app requires;
        /// the refusal names the key, the value wanted and the value found.
        fn check_metadata(&self, manifest: &Manifest) -> Result<()> {
            for (key, want) in &self.required_metadata {
                match manifest.metadata(key) {
                    Some(found) if same_value(found, want) => {}
                    Some(found) => {
                        return Err(incompatible(format!(
                            "the bundle's metadata has {key} = {}, the app requires {}",
                            shown_value(found),
                            shown_value(want)
                        )));
                    }
                    None => {
                        return Err(incompatible(format!(
                            "the bundle's metadata has no {key}, the app requires {key} = {}",
                            shown_value(want)
                        )));
                    }
                }
            }
            Ok(())
        }
    }

    pub_for_release! {
        /// Checks that every label the app requires is in the unpacked label list.
        fn check_required_labels<S: AsRef<str>>(&self, labels: &[S]) -> Result<()> {
            for required in &self.required_labels {
                if !labels.iter().any(|label| label.as_ref() == required) {
                    return Err(incompatible(format!(
                        "the label list lacks '{required}', which the app requires"
                    )));
                }
            }
            Ok(())
        }
    }
}

/// Builds a [`CompatibilityPolicy`]; see [`CompatibilityPolicy::builder`].
#[derive(Debug, Clone)]
#[must_use]
pub struct CompatibilityPolicyBuilder {
    policy: CompatibilityPolicy,
}

impl CompatibilityPolicyBuilder {
    /// Requires this model format.
    pub fn format(mut self, format: ModelFormat) -> Self {
        self.policy.format = Some(format);
        self
    }

    /// Requires an ONNX model whose default opset is at most `max` (what the app's runtime
    /// supports).
    pub fn max_opset(mut self, max: u64) -> Self {
        self.policy.max_opset = Some(max);
        self
    }

    /// Adds an input the app feeds. Once any input is stated, the model must need no other.
    pub fn input(mut self, spec: TensorSpec) -> Self {
        self.policy.inputs.push(spec);
        self
    }

    /// Adds an output the app reads.
    pub fn output(mut self, spec: TensorSpec) -> Self {
        self.policy.outputs.push(spec);
        self
    }

    /// Requires 8-bit weights (`true`) or float weights (`false`), as the signed model
    /// signature records them.
    pub fn weights_8bit(mut self, eight_bit: bool) -> Self {
        self.policy.weights_8bit = Some(eight_bit);
        self
    }

    /// Accepts label lists whose count is in this range.
    pub fn label_count(mut self, range: RangeInclusive<usize>) -> Self {
        self.policy.label_count = Some(range);
        self
    }

    /// Requires this label in the label list (the app's code refers to it by name).
    pub fn require_label(mut self, label: impl Into<String>) -> Self {
        self.policy.required_labels.push(label.into());
        self
    }

    /// Names the classifier: the label list must have one label per class of this ONNX output
    /// or safetensors tensor (one `pack --classifier-output` recorded). The class dimension is
    /// the one [`CompatibilityPolicyBuilder::class_dim`] sets; else the one `pack --class-dim`
    /// recorded for this tensor; else, for ONNX, the last dimension when it is fixed above 1,
    /// or the one dimension after the first fixed above 1 with every other fixed at 1
    /// (`[1, 1000, 1, 1]`), and for safetensors dimension 0 (a `[C]` bias or a `[C, in]`
    /// weight).
    pub fn classifier_output(mut self, name: impl Into<String>) -> Self {
        self.policy.classifier_output = Some(name.into());
        self
    }

    /// The dimension of the classifier output that counts the classes (0 is the first), when
    /// the app knows it better than the model's shape says; it must be a fixed size.
    pub fn class_dim(mut self, dim: u32) -> Self {
        self.policy.class_dim = Some(dim);
        self
    }

    /// Requires the bundle's signed metadata to hold `value` at the dotted `key`
    /// (`.require_metadata("preprocess.colour_order", "rgb")`). Numbers compare by value,
    /// so `1` equals `1.0`; anything else must be equal exactly.
    pub fn require_metadata(
        mut self,
        key: impl Into<String>,
        value: impl Into<serde_json::Value>,
    ) -> Self {
        self.policy
            .required_metadata
            .push((key.into(), value.into()));
        self
    }

    /// Checks the policy is consistent and returns it.
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Policy`] for a tensor or metadata key stated twice, an empty label-count
    /// range, a metadata key that is not a key (segments of `a-z`, `0-9`, `_` joined by dots)
    /// or a required metadata value of `null`.
    pub fn build(self) -> Result<CompatibilityPolicy> {
        let policy = self.policy;
        for (i, (key, value)) in policy.required_metadata.iter().enumerate() {
            let refuse = |why: String| Err(Error::new(ErrorKind::Policy, why));
            if let Err(e) = parse_key(key) {
                return refuse(format!("the policy's required {e}"));
            }
            if value.is_null() {
                return refuse(format!(
                    "the policy requires metadata key '{key}' to be null, which no bundle holds"
                ));
            }
            if policy.required_metadata[..i].iter().any(|(k, _)| k == key) {
                return refuse(format!("the policy requires metadata key '{key}' twice"));
            }
        }
        for (role, specs) in [("input", &policy.inputs), ("output", &policy.outputs)] {
            for (i, spec) in specs.iter().enumerate() {
                if specs[..i].iter().any(|other| other.name == spec.name) {
                    return Err(Error::new(
                        ErrorKind::Policy,
                        format!("the policy states {role} '{}' twice", spec.name),
                    ));
                }
            }
        }
        if let Some(range) = &policy.label_count
            && range.is_empty()
        {
            return Err(Error::new(
                ErrorKind::Policy,
                format!(
                    "the policy's label count range {} to {} is empty",
                    range.start(),
                    range.end()
                ),
            ));
        }
        Ok(policy)
    }
}
