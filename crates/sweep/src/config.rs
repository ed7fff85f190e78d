//! The sweep file: which models, test and dev sets, and which axes to cross (every key with its
//! default: `docs/formats.md`, "Sweep file").
//!
//! Everything is checked here, before any work starts: every named file exists, every axis has
//! at least one value, names are unique, the baseline names values that exist. Inner code then
//! receives a [`Sweep`] whose paths are absolute and whose grid is non-empty.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

use isogloss_lm::Smoothing;
use serde::Deserialize;

use crate::SweepError;

/// The placeholder in language-model text paths that stands for the transcript column, so that
/// one LM build builds a dialectal LM for the dialectal column and a normalized one for the other.
pub const COLUMN_PLACEHOLDER: &str = "{column}";

/// Most cells a sweep may cross (each cell decodes the test set once).
pub const MAX_CELLS: usize = 100_000;

/// The sweep file as written by the user (TOML).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SweepFile {
    /// Folder for caches and results, relative to the sweep file.
    pub out_dir: PathBuf,
    /// Model directories (each with `model.safetensors` and `model.toml`).
    pub models: Vec<PathBuf>,
    /// The test manifest every cell is scored on.
    pub test: PathBuf,
    /// A development manifest for tuning the LM weight and word bonus (optional).
    #[serde(default)]
    pub dev: Option<PathBuf>,
    /// Transcript columns to decode and score against (e.g. `dialectal`, `normalized`).
    pub columns: Vec<String>,
    /// Variant maps (`variant<TAB>normalized`) for flexible WER, one per column name; a column
    /// without one is scored by plain WER only.
    #[serde(default)]
    pub variants: std::collections::BTreeMap<String, PathBuf>,
    /// Grouping column of the test manifest for per-group figures.
    #[serde(default = "default_group_by")]
    pub group_by: String,
    /// Seed of the bootstrap.
    #[serde(default = "default_seed")]
    pub seed: u64,
    /// Bootstrap resamples.
    #[serde(default = "default_resamples")]
    pub resamples: usize,
    /// Confidence level of the bootstrap intervals, in (0, 1).
    #[serde(default = "default_confidence")]
    pub confidence: f64,
    /// The cell every other cell is compared with.
    #[serde(default)]
    pub baseline: Option<BaselineFile>,
    /// The language-model axis.
    #[serde(default, rename = "lm")]
    pub lms: Vec<LmSpec>,
    /// The lexicon axis.
    #[serde(default, rename = "lexicon")]
    pub lexicons: Vec<LexiconSpec>,
    /// The decoder-settings axes.
    #[serde(default)]
    pub decoder: DecoderAxes,
}

fn default_group_by() -> String {
    "dialect".into()
}
fn default_seed() -> u64 {
    1
}
fn default_resamples() -> usize {
    1000
}
fn default_confidence() -> f64 {
    0.95
}

/// The baseline cell, by the names of its axis values; unnamed axes take their first value.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BaselineFile {
    /// Model directory name (the folder's last component).
    pub model: Option<String>,
    /// Transcript column.
    pub column: Option<String>,
    /// LM name.
    pub lm: Option<String>,
    /// Lexicon name.
    pub lexicon: Option<String>,
}

/// One value of the language-model axis: an ARPA file, or an LM build (how to build one).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LmSpec {
    /// Short name shown in the results.
    pub name: String,
    /// An existing ARPA file (`.arpa` or `.arpa.gz`); excludes the build fields.
    #[serde(default)]
    pub file: Option<PathBuf>,
    /// Build: n-gram order (1–6).
    #[serde(default)]
    pub order: Option<usize>,
    /// Build: smoothing, `modified-kneser-ney` (default), `kneser-ney`, `witten-bell` or `add-k`
    /// (k = 1). The codes of the previous release (`mkn`, `kn`, `wb`, `add`) are read with a
    /// deprecation warning.
    #[serde(default)]
    pub smoothing: Option<String>,
    /// Build: in-domain training texts; `{column}` is replaced by the transcript column.
    #[serde(default)]
    pub text: Vec<PathBuf>,
    /// Build: out-of-domain text, mixed in with a weight estimated on the dev transcripts
    /// (or `out_of_domain_weight` when given). Previous spelling: `ood`.
    #[serde(default, alias = "ood")]
    pub out_of_domain: Option<PathBuf>,
    /// Build: a fixed out-of-domain mixture weight in (0, 1) instead of estimating it. Previous
    /// spelling: `ood_weight`.
    #[serde(default, alias = "ood_weight")]
    pub out_of_domain_weight: Option<f64>,
}

/// One value of the lexicon axis.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LexiconSpec {
    /// Short name shown in the results.
    pub name: String,
    /// `grapheme` (spelling as units), `rules` (rule file), `g2p` (trained model) or `file`.
    pub kind: String,
    /// The rule file (`rules`), G2P model (`g2p`) or lexicon TSV (`file`).
    #[serde(default)]
    pub path: Option<PathBuf>,
}

/// Decoder settings crossed in the grid; each list must be non-empty.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DecoderAxes {
    /// Beam widths.
    #[serde(default = "default_beam")]
    pub beam: Vec<usize>,
    /// LM weights.
    #[serde(default = "default_lm_weight")]
    pub lm_weight: Vec<f32>,
    /// Word insertion bonuses.
    #[serde(default = "default_word_bonus")]
    pub word_bonus: Vec<f32>,
    /// Tune LM weight and word bonus on the dev set per LM × lexicon cell (`none`, `grid` or
    /// `coordinate`): `grid` tries every weight × bonus pair of the lists on dev, `coordinate`
    /// walks the two lists one at a time from their middle values (fewer dev decodes), and only
    /// the best pair is scored on test.
    #[serde(default = "default_tune")]
    pub tune: String,
}

impl Default for DecoderAxes {
    fn default() -> Self {
        DecoderAxes {
            beam: default_beam(),
            lm_weight: default_lm_weight(),
            word_bonus: default_word_bonus(),
            tune: default_tune(),
        }
    }
}

fn default_beam() -> Vec<usize> {
    vec![isogloss_decoder::DEFAULT_BEAM]
}
fn default_lm_weight() -> Vec<f32> {
    vec![isogloss_decoder::DEFAULT_LM_WEIGHT]
}
fn default_word_bonus() -> Vec<f32> {
    vec![isogloss_decoder::DEFAULT_WORD_BONUS]
}
fn default_tune() -> String {
    "none".into()
}

/// A checked sweep: absolute paths, non-empty axes.
#[derive(Debug, Clone)]
pub struct Sweep {
    /// The sweep file itself.
    pub path: PathBuf,
    /// Caches and results.
    pub out_dir: PathBuf,
    /// Model directories.
    pub models: Vec<PathBuf>,
    /// Test manifest.
    pub test: PathBuf,
    /// Dev manifest (required when tuning).
    pub dev: Option<PathBuf>,
    /// Transcript columns.
    pub columns: Vec<String>,
    /// Variant map per column (absent: plain WER only).
    pub variants: std::collections::BTreeMap<String, PathBuf>,
    /// Grouping column.
    pub group_by: String,
    /// Bootstrap seed.
    pub seed: u64,
    /// Bootstrap resamples.
    pub resamples: usize,
    /// Confidence level of the bootstrap intervals.
    pub confidence: f64,
    /// Language models.
    pub lms: Vec<LmChoice>,
    /// Lexicons.
    pub lexicons: Vec<LexiconChoice>,
    /// Decoder settings.
    pub decoder: DecoderGrid,
    /// The baseline cell's axis values.
    pub baseline: Baseline,
}

/// A checked language-model axis value.
#[derive(Debug, Clone, PartialEq)]
pub enum LmChoice {
    /// An ARPA file used as it is.
    File {
        /// Name in the results.
        name: String,
        /// The ARPA file.
        path: PathBuf,
    },
    /// A model built by the sweep (an LM build).
    Build {
        /// Name in the results.
        name: String,
        /// N-gram order.
        order: usize,
        /// Smoothing method.
        smoothing: Smoothing,
        /// Training texts, `{column}` not yet replaced.
        text: Vec<PathBuf>,
        /// Out-of-domain text.
        out_of_domain: Option<PathBuf>,
        /// Fixed out-of-domain weight.
        out_of_domain_weight: Option<f64>,
    },
}

impl LmChoice {
    /// The name shown in results.
    pub fn name(&self) -> &str {
        match self {
            LmChoice::File { name, .. } | LmChoice::Build { name, .. } => name,
        }
    }
}

/// How a lexicon is made.
#[derive(Debug, Clone, PartialEq)]
pub enum LexiconKind {
    /// Each word's letters are its units.
    Grapheme,
    /// Rule-based G2P with this rule file.
    Rules(PathBuf),
    /// Trained joint-sequence G2P with this model file.
    G2p(PathBuf),
    /// A lexicon file used as it is.
    File(PathBuf),
}

/// A checked lexicon axis value.
#[derive(Debug, Clone, PartialEq)]
pub struct LexiconChoice {
    /// Name in the results.
    pub name: String,
    /// How it is made.
    pub kind: LexiconKind,
}

/// The decoder-settings axes, checked.
#[derive(Debug, Clone, PartialEq)]
pub struct DecoderGrid {
    /// Beam widths.
    pub beams: Vec<usize>,
    /// LM weights.
    pub lm_weights: Vec<f32>,
    /// Word bonuses.
    pub word_bonuses: Vec<f32>,
    /// Whether and how LM weight and word bonus are tuned on dev.
    pub tuning: Tuning,
}

/// How LM weight and word bonus are chosen per cell.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Tuning {
    /// Every weight × bonus pair is a cell of its own, scored on test.
    None,
    /// Every pair is decoded on dev; the best is scored on test.
    Grid,
    /// Coordinate search on dev: from the middle of both lists, the best weight for the current
    /// bonus, then the best bonus for that weight, until neither changes.
    Coordinate,
}

/// The baseline cell's axis values, resolved to indices.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Baseline {
    /// Index into `models`.
    pub model: usize,
    /// Index into `columns`.
    pub column: usize,
    /// Index into `lms`.
    pub lm: usize,
    /// Index into `lexicons`.
    pub lexicon: usize,
}

impl Sweep {
    /// Reads and checks a sweep file. Relative paths are taken from the file's folder.
    pub fn read(path: &Path) -> Result<Sweep, SweepError> {
        let text = std::fs::read_to_string(path).map_err(|source| SweepError::Io {
            path: path.to_path_buf(),
            source,
        })?;
        for notice in deprecated_spellings(&text) {
            eprintln!("warning: {}: {notice}", path.display());
        }
        let file: SweepFile = toml::from_str(&text).map_err(|error| {
            let line = error
                .span()
                .map(|span| text[..span.start].matches('\n').count() + 1)
                .unwrap_or(1);
            SweepError::Config {
                path: path.to_path_buf(),
                line,
                message: error.message().to_string(),
            }
        })?;
        Sweep::check(path, file, &text)
    }

    fn check(path: &Path, file: SweepFile, text: &str) -> Result<Sweep, SweepError> {
        let base = path.parent().unwrap_or(Path::new("")).to_path_buf();
        let resolve = |p: &Path| -> PathBuf {
            if p.is_absolute() {
                p.to_path_buf()
            } else {
                base.join(p)
            }
        };
        // Point the message at the line that mentions the offending key, when it can be found.
        let line_of = |needle: &str| -> usize {
            text.lines()
                .position(|line| line.contains(needle))
                .map_or(1, |i| i + 1)
        };
        let problem = |needle: &str, message: String| SweepError::Config {
            path: path.to_path_buf(),
            line: line_of(needle),
            message,
        };
        let must_exist = |needle: &str, what: &str, p: &Path| -> Result<(), SweepError> {
            if p.exists() {
                Ok(())
            } else {
                Err(problem(
                    needle,
                    format!("{what} `{}` does not exist", p.display()),
                ))
            }
        };

        if file.models.is_empty() {
            return Err(problem(
                "models",
                "the grid is empty: `models` lists no model".into(),
            ));
        }
        let models: Vec<PathBuf> = file.models.iter().map(|m| resolve(m)).collect();
        for (written, model) in file.models.iter().zip(&models) {
            must_exist(&written.display().to_string(), "model directory", model)?;
        }
        let test = resolve(&file.test);
        must_exist("test", "test manifest", &test)?;
        let dev = file.dev.as_deref().map(resolve);
        if let Some(dev) = &dev {
            must_exist("dev", "dev manifest", dev)?;
        }
        if file.columns.is_empty() {
            return Err(problem(
                "columns",
                "the grid is empty: `columns` lists no transcript column".into(),
            ));
        }
        unique(&file.columns, |c| c.as_str())
            .map_err(|c| problem("columns", format!("column `{c}` is listed twice")))?;
        let mut variants = std::collections::BTreeMap::new();
        for (column, written) in &file.variants {
            if !file.columns.contains(column) {
                return Err(problem(
                    "variants",
                    format!("a variant map is given for column `{column}`, which `columns` does not list"),
                ));
            }
            let resolved = resolve(written);
            must_exist(&written.display().to_string(), "variant map", &resolved)?;
            variants.insert(column.clone(), resolved);
        }

        if file.lms.is_empty() {
            return Err(problem(
                "[[lm]]",
                "the grid is empty: no `[[lm]]` entry".into(),
            ));
        }
        unique(&file.lms, |l| l.name.as_str())
            .map_err(|n| problem(&n, format!("LM name `{n}` is used twice")))?;
        let mut lms = Vec::new();
        for spec in &file.lms {
            let needle = format!("\"{}\"", spec.name);
            let build_fields = spec.order.is_some()
                || spec.smoothing.is_some()
                || !spec.text.is_empty()
                || spec.out_of_domain.is_some();
            match (&spec.file, build_fields) {
                (Some(written), false) => {
                    let p = resolve(written);
                    must_exist(&needle, "language model", &p)?;
                    lms.push(LmChoice::File { name: spec.name.clone(), path: p });
                }
                (Some(_), true) => {
                    return Err(problem(&needle, format!("LM `{}` gives both `file` and build fields (order, smoothing, text, out_of_domain); give one or the other", spec.name)))
                }
                (None, _) => {
                    let order = spec.order.ok_or_else(|| problem(&needle, format!("LM `{}` needs either `file` or a build with `order`", spec.name)))?;
                    if !(1..=6).contains(&order) {
                        return Err(problem(&needle, format!("LM `{}`: order must be 1 to 6, found {order}", spec.name)));
                    }
                    let written = spec.smoothing.as_deref().unwrap_or(Smoothing::NAMES[0]);
                    let name = previous_smoothing_code(written).unwrap_or(written);
                    // add-one is the usual pseudo-count of additive smoothing (common practice).
                    let smoothing = Smoothing::from_name(name, 1.0).ok_or_else(|| problem(&needle, format!("LM `{}`: smoothing must be {}, found `{written}`", spec.name, Smoothing::NAMES.join(", "))))?;
                    if spec.text.is_empty() {
                        return Err(problem(&needle, format!("LM `{}`: a build needs at least one `text`", spec.name)));
                    }
                    let text: Vec<PathBuf> = spec.text.iter().map(|t| resolve(t)).collect();
                    for t in &text {
                        for column in &file.columns {
                            let concrete = with_column(t, column);
                            must_exist(&needle, &format!("LM `{}` training text", spec.name), &concrete)?;
                        }
                    }
                    let out_of_domain = spec.out_of_domain.as_deref().map(resolve);
                    if let Some(path) = &out_of_domain {
                        must_exist(&needle, &format!("LM `{}` out-of-domain text", spec.name), path)?;
                        if spec.out_of_domain_weight.is_none() && dev.is_none() {
                            return Err(problem(&needle, format!("LM `{}` mixes in out-of-domain text: give `out_of_domain_weight` or a `dev` manifest to estimate it on", spec.name)));
                        }
                    }
                    if let Some(weight) = spec.out_of_domain_weight {
                        if !(weight > 0.0 && weight < 1.0) {
                            return Err(problem(&needle, format!("LM `{}`: out_of_domain_weight must lie strictly between 0 and 1, found {weight}", spec.name)));
                        }
                    }
                    lms.push(LmChoice::Build { name: spec.name.clone(), order, smoothing, text, out_of_domain, out_of_domain_weight: spec.out_of_domain_weight });
                }
            }
        }

        if file.lexicons.is_empty() {
            return Err(problem(
                "[[lexicon]]",
                "the grid is empty: no `[[lexicon]]` entry".into(),
            ));
        }
        unique(&file.lexicons, |l| l.name.as_str())
            .map_err(|n| problem(&n, format!("lexicon name `{n}` is used twice")))?;
        let mut lexicons = Vec::new();
        for spec in &file.lexicons {
            let needle = format!("\"{}\"", spec.name);
            let path_of = |what: &str| -> Result<PathBuf, SweepError> {
                let written = spec.path.as_ref().ok_or_else(|| {
                    problem(
                        &needle,
                        format!(
                            "lexicon `{}` of kind `{}` needs a `path` to its {what}",
                            spec.name, spec.kind
                        ),
                    )
                })?;
                let p = resolve(written);
                must_exist(&needle, &format!("lexicon `{}` {what}", spec.name), &p)?;
                Ok(p)
            };
            let kind = match spec.kind.as_str() {
                "grapheme" => LexiconKind::Grapheme,
                "rules" => LexiconKind::Rules(path_of("rule file")?),
                "g2p" => LexiconKind::G2p(path_of("G2P model")?),
                "file" => LexiconKind::File(path_of("lexicon file")?),
                other => {
                    return Err(problem(
                        &needle,
                        format!(
                        "lexicon `{}`: kind must be grapheme, rules, g2p or file, found `{other}`",
                        spec.name
                    ),
                    ))
                }
            };
            lexicons.push(LexiconChoice {
                name: spec.name.clone(),
                kind,
            });
        }

        let axes = &file.decoder;
        if axes.beam.is_empty() || axes.lm_weight.is_empty() || axes.word_bonus.is_empty() {
            return Err(problem(
                "[decoder]",
                "the grid is empty: a `[decoder]` list (beam, lm_weight, word_bonus) has no value"
                    .into(),
            ));
        }
        if let Some(beam) = axes
            .beam
            .iter()
            .find(|&&b| !(1..=isogloss_decoder::MAX_BEAM).contains(&b))
        {
            return Err(problem(
                "beam",
                format!(
                    "beam widths must be from 1 to {}, found {beam}",
                    isogloss_decoder::MAX_BEAM
                ),
            ));
        }
        if let Some(value) = axes
            .lm_weight
            .iter()
            .chain(&axes.word_bonus)
            .find(|v| !v.is_finite())
        {
            return Err(problem(
                "[decoder]",
                format!("LM weights and word bonuses must be finite numbers, found {value}"),
            ));
        }
        let cells = [
            file.models.len(),
            file.columns.len(),
            file.lms.len(),
            file.lexicons.len(),
            axes.beam.len(),
            axes.lm_weight.len(),
            axes.word_bonus.len(),
        ]
        .iter()
        .fold(1usize, |product, &n| product.saturating_mul(n));
        if cells > MAX_CELLS {
            return Err(problem(
                "[decoder]",
                format!("the grid has {cells} cells (models × columns × LMs × lexicons × beams × LM weights × word bonuses); at most {MAX_CELLS} are supported"),
            ));
        }
        let tuning = match axes.tune.as_str() {
            "none" => Tuning::None,
            "grid" => Tuning::Grid,
            "coordinate" => Tuning::Coordinate,
            other => {
                return Err(problem(
                    "tune",
                    format!("tune must be `none`, `grid` or `coordinate`, found `{other}`"),
                ))
            }
        };
        if tuning != Tuning::None && dev.is_none() {
            return Err(problem(
                "tune",
                "tuning on dev needs a `dev` manifest".into(),
            ));
        }
        if !(1..=isogloss_score::MAX_RESAMPLES).contains(&file.resamples) {
            return Err(problem(
                "resamples",
                format!(
                    "resamples must be from 1 to {}, found {}",
                    isogloss_score::MAX_RESAMPLES,
                    file.resamples
                ),
            ));
        }
        if !(file.confidence > 0.0 && file.confidence < 1.0) {
            return Err(problem(
                "confidence",
                format!(
                    "confidence must lie strictly between 0 and 1 (e.g. 0.95), found {}",
                    file.confidence
                ),
            ));
        }

        let baseline_file = file.baseline.clone().unwrap_or_default();
        let find = |wanted: &Option<String>,
                    names: Vec<String>,
                    axis: &str|
         -> Result<usize, SweepError> {
            match wanted {
                None => Ok(0),
                Some(name) => names.iter().position(|n| n == name).ok_or_else(|| {
                    problem("baseline", format!("the baseline names {axis} `{name}`, which the sweep does not have (it has: {})", names.join(", ")))
                }),
            }
        };
        let model_names: Vec<String> = models.iter().map(|m| model_name(m)).collect();
        let baseline = Baseline {
            model: find(&baseline_file.model, model_names, "model")?,
            column: find(&baseline_file.column, file.columns.clone(), "column")?,
            lm: find(
                &baseline_file.lm,
                lms.iter().map(|l| l.name().to_string()).collect(),
                "LM",
            )?,
            lexicon: find(
                &baseline_file.lexicon,
                lexicons.iter().map(|l| l.name.clone()).collect(),
                "lexicon",
            )?,
        };

        Ok(Sweep {
            path: path.to_path_buf(),
            out_dir: resolve(&file.out_dir),
            models,
            test,
            dev,
            columns: file.columns,
            variants,
            group_by: file.group_by,
            seed: file.seed,
            resamples: file.resamples,
            confidence: file.confidence,
            lms,
            lexicons,
            decoder: DecoderGrid {
                beams: axes.beam.clone(),
                lm_weights: axes.lm_weight.clone(),
                word_bonuses: axes.word_bonus.clone(),
                tuning,
            },
            baseline,
        })
    }

    /// Every cell of the grid, in a fixed order (model, column, LM, lexicon, beam, and — unless
    /// tuned on dev — LM weight and word bonus).
    pub fn cells(&self) -> Vec<Cell> {
        let (weights, bonuses): (Vec<Option<f32>>, Vec<Option<f32>>) =
            if self.decoder.tuning != Tuning::None {
                (vec![None], vec![None])
            } else {
                (
                    self.decoder.lm_weights.iter().copied().map(Some).collect(),
                    self.decoder
                        .word_bonuses
                        .iter()
                        .copied()
                        .map(Some)
                        .collect(),
                )
            };
        let mut cells = Vec::new();
        for model in 0..self.models.len() {
            for column in 0..self.columns.len() {
                for lm in 0..self.lms.len() {
                    for lexicon in 0..self.lexicons.len() {
                        for &beam in &self.decoder.beams {
                            for &lm_weight in &weights {
                                for &word_bonus in &bonuses {
                                    cells.push(Cell {
                                        model,
                                        column,
                                        lm,
                                        lexicon,
                                        beam,
                                        lm_weight,
                                        word_bonus,
                                    });
                                }
                            }
                        }
                    }
                }
            }
        }
        cells
    }
}

/// One cell of the grid, by axis indices. LM weight and word bonus are `None` when they are
/// tuned on dev.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Cell {
    /// Index into `Sweep::models`.
    pub model: usize,
    /// Index into `Sweep::columns`.
    pub column: usize,
    /// Index into `Sweep::lms`.
    pub lm: usize,
    /// Index into `Sweep::lexicons`.
    pub lexicon: usize,
    /// Beam width.
    pub beam: usize,
    /// LM weight (fixed), or `None` when tuned.
    pub lm_weight: Option<f32>,
    /// Word bonus (fixed), or `None` when tuned.
    pub word_bonus: Option<f32>,
}

/// The smoothing codes of the previous release and the names that replace them.
const PREVIOUS_SMOOTHING_CODES: [(&str, &str); 4] = [
    ("mkn", "modified-kneser-ney"),
    ("kn", "kneser-ney"),
    ("wb", "witten-bell"),
    ("add", "add-k"),
];

fn previous_smoothing_code(code: &str) -> Option<&'static str> {
    PREVIOUS_SMOOTHING_CODES
        .iter()
        .find(|(old, _)| *old == code)
        .map(|(_, new)| *new)
}

/// One deprecation notice per spelling of the previous release in a sweep file (`ood`,
/// `ood_weight`, smoothing codes), naming the LM; callers print them as warnings.
pub fn deprecated_spellings(text: &str) -> Vec<String> {
    let Ok(table) = text.parse::<toml::Table>() else {
        return Vec::new();
    };
    let lms = table.get("lm").and_then(toml::Value::as_array);
    let mut notices = Vec::new();
    for lm in lms.into_iter().flatten().filter_map(toml::Value::as_table) {
        let name = lm.get("name").and_then(toml::Value::as_str).unwrap_or("?");
        for (old, new) in [
            ("ood", "out_of_domain"),
            ("ood_weight", "out_of_domain_weight"),
        ] {
            if lm.contains_key(old) {
                notices.push(format!(
                    "LM `{name}`: the key `{old}` is deprecated; write `{new}`"
                ));
            }
        }
        let code = lm.get("smoothing").and_then(toml::Value::as_str);
        if let Some(new) = code.and_then(previous_smoothing_code) {
            notices.push(format!(
                "LM `{name}`: smoothing `{}` is deprecated; write `{new}`",
                code.unwrap_or_default()
            ));
        }
    }
    notices
}

/// A model's short name: its directory's last component.
pub fn model_name(dir: &Path) -> String {
    dir.file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| dir.display().to_string())
}

/// Replaces `{column}` in a path by the column name.
pub fn with_column(path: &Path, column: &str) -> PathBuf {
    PathBuf::from(path.to_string_lossy().replace(COLUMN_PLACEHOLDER, column))
}

fn unique<T>(items: &[T], key: impl Fn(&T) -> &str) -> Result<(), String> {
    let mut seen = BTreeSet::new();
    for item in items {
        if !seen.insert(key(item)) {
            return Err(key(item).to_string());
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A folder with the files a sweep names, and the sweep file itself.
    fn setup(sweep: &str) -> (tempfile::TempDir, Result<Sweep, SweepError>) {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        std::fs::create_dir_all(root.join("models/small")).unwrap();
        for file in [
            "test.tsv",
            "dev.tsv",
            "train.dialectal.txt",
            "train.normalized.txt",
            "ood.txt",
            "rules.toml",
            "v.tsv",
        ] {
            std::fs::write(root.join(file), "x\n").unwrap();
        }
        let path = root.join("sweep.toml");
        std::fs::write(&path, sweep).unwrap();
        let result = Sweep::read(&path);
        (dir, result)
    }

    const GOOD: &str = r#"
out_dir = "out"
models = ["models/small"]
test = "test.tsv"
dev = "dev.tsv"
columns = ["dialectal", "normalized"]
variants = { dialectal = "v.tsv" }
baseline = { lm = "three", lexicon = "letters" }

[[lm]]
name = "two"
order = 2
smoothing = "witten-bell"
text = ["train.{column}.txt"]

[[lm]]
name = "three"
order = 3
text = ["train.{column}.txt"]
out_of_domain = "ood.txt"

[[lexicon]]
name = "rules"
kind = "rules"
path = "rules.toml"

[[lexicon]]
name = "letters"
kind = "grapheme"

[decoder]
beam = [8, 16]
lm_weight = [0.5, 1.0, 1.5]
"#;

    #[test]
    fn a_good_sweep_expands_to_the_full_grid() {
        let (dir, sweep) = setup(GOOD);
        let sweep = sweep.unwrap();
        // 1 model × 2 columns × 2 LMs × 2 lexicons × 2 beams × 3 weights × 1 bonus
        assert_eq!(sweep.cells().len(), 48);
        assert_eq!(sweep.baseline.lm, 1);
        assert_eq!(sweep.baseline.lexicon, 1);
        assert_eq!(sweep.out_dir, dir.path().join("out"));
        assert_eq!(
            with_column(
                match &sweep.lms[0] {
                    LmChoice::Build { text, .. } => &text[0],
                    LmChoice::File { .. } => unreachable!("the first LM is a build"),
                },
                "normalized"
            ),
            dir.path().join("train.normalized.txt")
        );
    }

    #[test]
    fn tuning_collapses_the_weight_and_bonus_axes() {
        let (_dir, sweep) = setup(&GOOD.replace(
            "lm_weight = [0.5, 1.0, 1.5]",
            "lm_weight = [0.5, 1.0, 1.5]\ntune = \"grid\"",
        ));
        let cells = sweep.unwrap().cells();
        assert_eq!(cells.len(), 16);
        assert!(cells
            .iter()
            .all(|c| c.lm_weight.is_none() && c.word_bonus.is_none()));
    }

    fn error_of(sweep: &str) -> String {
        setup(sweep).1.unwrap_err().to_string()
    }

    /// Issue 16: `resamples = 1e11` reserved room for 1e11 bootstrap rates (an abort). Counts
    /// and widths beyond their limits are now errors naming the file and key.
    #[test]
    fn counts_beyond_their_limits_are_errors() {
        for (extra, expected) in [
            (
                "resamples = 100000000000",
                "resamples must be from 1 to 1000000",
            ),
            ("resamples = 0", "resamples must be from 1 to 1000000"),
        ] {
            let message = error_of(&GOOD.replace("out_dir", &format!("{extra}\nout_dir")));
            assert!(
                message.contains("sweep.toml") && message.contains(expected),
                "{message}"
            );
        }
        let message = error_of(&GOOD.replace("beam = [8, 16]", "beam = [8, 100000]"));
        assert!(
            message.contains("beam widths must be from 1 to 4096"),
            "{message}"
        );
        let message = error_of(&GOOD.replace("lm_weight = [0.5, 1.0, 1.5]", "lm_weight = [nan]"));
        assert!(message.contains("finite"), "{message}");
        let many: Vec<String> = (0..400).map(|i| format!("{i}.0")).collect();
        let message = error_of(&GOOD.replace(
            "lm_weight = [0.5, 1.0, 1.5]",
            &format!(
                "lm_weight = [{}]\nword_bonus = [{}]",
                many.join(", "),
                many.join(", ")
            ),
        ));
        assert!(
            message.contains("at most 100000 are supported"),
            "{message}"
        );
    }

    #[test]
    fn a_missing_file_is_named_with_its_line() {
        let message = error_of(&GOOD.replace("path = \"rules.toml\"", "path = \"nowhere.toml\""));
        assert!(
            message.contains("nowhere.toml") && message.contains("does not exist"),
            "{message}"
        );
        assert!(message.contains("line 23"), "{message}"); // the entry's `name` line
        let message = error_of(&GOOD.replace(
            "train.{column}.txt\"]\nout_of_domain",
            "train.{column}.text\"]\nout_of_domain",
        ));
        assert!(message.contains("train.dialectal.text"), "{message}");
    }

    #[test]
    fn an_empty_axis_is_refused_before_any_work() {
        let no_lexicon = GOOD.split("[[lexicon]]").next().unwrap().to_string() + "[decoder]\n";
        assert!(error_of(&no_lexicon.replace(", lexicon = \"letters\"", ""))
            .contains("no `[[lexicon]]`"));
        assert!(error_of(&GOOD.replace("beam = [8, 16]", "beam = []")).contains("grid is empty"));
        assert!(error_of(&GOOD.replace(
            "columns = [\"dialectal\", \"normalized\"]\nvariants = { dialectal = \"v.tsv\" }",
            "columns = []"
        ))
        .contains("grid is empty"));
    }

    #[test]
    fn bad_values_are_explained() {
        assert!(error_of(&GOOD.replace("order = 2", "order = 7"))
            .contains("order must be 1 to 6, found 7"));
        assert!(error_of(
            &GOOD.replace("smoothing = \"witten-bell\"", "smoothing = \"good-turing\"")
        )
        .contains("found `good-turing`"));
        assert!(error_of(&GOOD.replace("lm = \"three\"", "lm = \"four\""))
            .contains("baseline names LM `four`"));
        assert!(
            error_of(&GOOD.replace("kind = \"grapheme\"", "kind = \"phones\""))
                .contains("found `phones`")
        );
        assert!(
            error_of(&GOOD.replace("name = \"two\"", "name = \"three\"")).contains("used twice")
        );
        let syntax = error_of(&GOOD.replace("order = 2", "order = = 2"));
        assert!(syntax.contains("line 12"), "{syntax}");
    }

    #[test]
    fn out_of_domain_mixing_needs_dev_or_a_weight() {
        let no_dev = GOOD.replace("dev = \"dev.tsv\"\n", "");
        assert!(error_of(&no_dev).contains("give `out_of_domain_weight` or a `dev` manifest"));
        let (_dir, sweep) = setup(&no_dev.replace(
            "out_of_domain = \"ood.txt\"",
            "out_of_domain = \"ood.txt\"\nout_of_domain_weight = 0.2",
        ));
        assert!(sweep.is_ok());
    }

    #[test]
    fn spellings_of_the_previous_release_are_read_and_named_as_deprecated() {
        let old = GOOD
            .replace("smoothing = \"witten-bell\"", "smoothing = \"wb\"")
            .replace(
                "out_of_domain = \"ood.txt\"",
                "ood = \"ood.txt\"\nood_weight = 0.3",
            );
        let (_dir, sweep) = setup(&old);
        let sweep = sweep.unwrap();
        assert!(matches!(
            &sweep.lms[0],
            LmChoice::Build {
                smoothing: Smoothing::WittenBell,
                ..
            }
        ));
        assert!(matches!(
            &sweep.lms[1],
            LmChoice::Build { smoothing: Smoothing::ModifiedKneserNey, out_of_domain: Some(_), out_of_domain_weight: Some(w), .. } if *w == 0.3
        ));
        let notices = deprecated_spellings(&old);
        assert_eq!(notices.len(), 3, "{notices:?}");
        assert!(notices[0].contains("LM `two`") && notices[0].contains("`wb`"));
        assert!(notices[1].contains("`ood`") && notices[2].contains("`ood_weight`"));
        assert!(deprecated_spellings(GOOD).is_empty());
    }

    #[test]
    fn the_confidence_level_is_checked() {
        let (_dir, sweep) = setup(&GOOD.replace("out_dir", "confidence = 0.9\nout_dir"));
        assert_eq!(sweep.unwrap().confidence, 0.9);
        assert!(
            error_of(&GOOD.replace("out_dir", "confidence = 95.0\nout_dir"))
                .contains("confidence must lie strictly between 0 and 1")
        );
    }
}
