//! `isogloss variants`: builds `variants.tsv` from two word-aligned transcript columns of a
//! manifest (e.g. `dialectal` → `normalized`). The pairing lives in `isogloss_score`.

use std::path::PathBuf;

use clap::Args;
use isogloss_corpus::tsv::Table;
use isogloss_score::{TokenRules, TranscriptPair, VariantTable};

use crate::Outcome;

/// Flags of `isogloss variants`.
#[derive(Args, Debug)]
pub struct VariantsArgs {
    /// Manifest with both transcript columns.
    #[arg(long, value_name = "MANIFEST")]
    pub manifest: PathBuf,
    /// Column whose words become the variants (e.g. `dialectal`).
    #[arg(long, value_name = "COLUMN")]
    pub from: String,
    /// Column whose words become the normalized forms (e.g. `normalized`).
    #[arg(long, value_name = "COLUMN")]
    pub to: String,
    /// Output file (`variant<TAB>normalized`).
    #[arg(long, value_name = "variants.tsv")]
    pub out: PathBuf,
}

/// Runs `isogloss variants`. Rows whose two writings have different token counts cannot be
/// paired word by word; they are skipped and listed on stderr. That is expected in dialect
/// corpora (contractions, clitics), so it is not a failure and the exit code stays 0.
pub fn run(args: VariantsArgs) -> anyhow::Result<Outcome> {
    let table = Table::read_with_header(&args.manifest)?;
    let id = table.column("id")?;
    let from = table.column(&args.from)?;
    let to = table.column(&args.to)?;
    let rows = table.records.iter().map(|record| TranscriptPair {
        id: record.fields[id].trim(),
        line: record.line,
        from: &record.fields[from],
        to: &record.fields[to],
    });
    let variants = VariantTable::build(rows, &TokenRules::default());
    variants.write(&args.out)?;
    for skipped in &variants.skipped {
        eprintln!(
            "skipped: {}, line {} (utterance `{}`): {} words in `{}` but {} in `{}`",
            args.manifest.display(),
            skipped.line,
            skipped.id,
            skipped.from_words,
            args.from,
            skipped.to_words,
            args.to
        );
    }
    eprintln!(
        "wrote {} variant pairs from {} utterances to {} ({} utterances skipped)",
        variants.pairs.len(),
        variants.utterances_used,
        args.out.display(),
        variants.skipped.len()
    );
    Ok(Outcome::Done)
}
