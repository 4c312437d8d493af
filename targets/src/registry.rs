//! The registry of target families (stub: filled in by the target-suite work).

use std::path::Path;

use crate::error::ParamError;
use crate::target::Target;

/// One parameter of a family, for `assay targets`.
#[derive(Debug, Clone, Copy)]
pub struct ParamInfo {
    /// Config key.
    pub name: &'static str,
    /// Default value as text, or `"required"`.
    pub default: &'static str,
    /// Allowed range as text.
    pub allowed: &'static str,
    /// One line of meaning.
    pub doc: &'static str,
}

/// One family, for `assay targets`.
#[derive(Debug, Clone, Copy)]
pub struct FamilyInfo {
    /// Family name as used in study files.
    pub name: &'static str,
    /// One line of meaning.
    pub summary: &'static str,
    /// Published source of the family and its reference values.
    pub source: &'static str,
    /// Parameters (besides `family` and `label`).
    pub params: &'static [ParamInfo],
}

/// All families.
pub fn families() -> &'static [FamilyInfo] {
    &[]
}

/// Names of all families.
pub fn family_names() -> Vec<&'static str> {
    families().iter().map(|f| f.name).collect()
}

/// The candidate nearest to `name` by edit distance, if it is close enough to be a likely typo.
pub fn nearest(name: &str, candidates: &[&str]) -> Option<String> {
    let _ = (name, candidates);
    None
}

/// Build a target from a `[[target]]` table (`family`, `dim` and the family's parameters; a
/// `label` key is ignored here, the given `label` is used). Relative data paths are resolved
/// against `base_dir`.
pub fn build_target(
    spec: &toml::Table,
    label: &str,
    base_dir: &Path,
) -> Result<Box<dyn Target>, ParamError> {
    let _ = (spec, label, base_dir);
    Err(ParamError::UnknownFamily {
        family: String::new(),
        suggestion: None,
    })
}
