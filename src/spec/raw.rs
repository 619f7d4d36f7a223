//! The TOML shape of a spec, as serde sees it. Nothing here is validated beyond types;
//! `spec::parse` turns these into a `Spec`.

use serde::Deserialize;
use toml::Spanned;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawSpec {
    pub name: Option<Spanned<String>>,
    pub task: Option<Spanned<String>>,
    pub description: Option<String>,
    pub data: Option<Spanned<RawData>>,
    pub split: Option<Spanned<RawSplit>>,
    pub select: Option<Spanned<RawSelect>>,
    pub guard: Option<Spanned<RawGuard>>,
    #[serde(default)]
    pub model: Vec<Spanned<RawModel>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawData {
    pub path: Option<Spanned<String>>,
    pub target: Option<Spanned<String>>,
    pub features: Option<Vec<Spanned<String>>>,
    pub ignore: Option<Vec<Spanned<String>>>,
    pub key: Option<Spanned<String>>,
    pub categorical: Option<Vec<Spanned<String>>>,
    pub sha256: Option<Spanned<String>>,
    pub positive: Option<Spanned<String>>,
    pub missing: Option<Spanned<String>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawSplit {
    pub method: Option<Spanned<String>>,
    pub seed: Option<Spanned<i64>>,
    pub test: Option<Spanned<f64>>,
    pub validation: Option<Spanned<f64>>,
    pub folds: Option<Spanned<toml::Value>>,
    pub repeats: Option<Spanned<i64>>,
    pub group: Option<Spanned<String>>,
    pub order: Option<Spanned<String>>,
    pub column: Option<Spanned<String>>,
    pub bins: Option<Spanned<i64>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawSelect {
    pub metric: Option<Spanned<String>>,
    pub rule: Option<Spanned<String>>,
    pub nested: Option<Spanned<bool>>,
    pub max_candidates: Option<Spanned<i64>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawGuard {
    pub reveals: Option<Spanned<i64>>,
    pub confidence: Option<Spanned<f64>>,
    pub mode: Option<Spanned<String>>,
    pub threshold: Option<Spanned<f64>>,
    pub noise: Option<Spanned<f64>>,
    pub step: Option<Spanned<f64>>,
    pub overlap: Option<Spanned<String>>,
}

/// Every key any built-in family accepts; which family takes which is checked in `spec::parse`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawModel {
    pub kind: Option<Spanned<String>>,
    pub standardize: Option<Spanned<bool>>,
    pub lambda: Option<Spanned<toml::Value>>,
    pub k: Option<Spanned<toml::Value>>,
    pub degree: Option<Spanned<toml::Value>>,
    pub feature: Option<Spanned<toml::Value>>,
    /// `kind = "command"`: the argv to run, its parameter grid, files to fingerprint, timeout.
    pub run: Option<Spanned<Vec<String>>>,
    pub params: Option<Spanned<toml::Table>>,
    pub inputs: Option<Vec<Spanned<String>>>,
    pub timeout: Option<Spanned<i64>>,
    /// `kind = "command"`: `false` runs the command outside the box (recorded and warned).
    pub sandbox: Option<Spanned<bool>>,
}
