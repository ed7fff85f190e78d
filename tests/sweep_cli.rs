//! End-to-end tests of `isogloss sweep` with the shipped demo model on a slice of the demo test
//! split: every cell of a 2×2 grid (two transcript columns × two LM orders) equals a separate
//! `lm build` + `transcribe` + `score` run with the same settings, and the posterior and cell
//! caches recompute exactly what depends on a changed recording or model.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

#[path = "../crates/chart/tests/support/geometry.rs"]
mod geometry;

use isogloss_lexicon::Lexicon;
use isogloss_lm::ArpaModel;
use isogloss_sweep::resources::lm_words;

fn repo(path: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../..")
        .join(path)
}

fn isogloss(args: &[&str]) -> Output {
    let output = Command::new(env!("CARGO_BIN_EXE_isogloss"))
        .args(args)
        .output()
        .expect("the isogloss binary runs");
    assert!(
        output.status.success(),
        "isogloss {args:?} failed: {}",
        String::from_utf8_lossy(&output.stderr)
    );
    output
}

fn text(path: &Path) -> String {
    path.to_str().expect("test paths are UTF-8").to_string()
}

/// A small test manifest: the first utterances of two test speakers, with their audio copied
/// into `dir` (so that the test may change a recording).
fn slice_of_test_split(dir: &Path) -> (PathBuf, Vec<String>) {
    let source = std::fs::read_to_string(repo("tests/data/demo/test.tsv")).unwrap();
    let mut lines = source.lines();
    let header = lines.next().unwrap();
    let mut kept = vec![header.to_string()];
    let mut speakers: Vec<String> = Vec::new();
    let mut per_speaker = std::collections::HashMap::new();
    std::fs::create_dir_all(dir.join("audio")).unwrap();
    for line in lines {
        let fields: Vec<&str> = line.split('\t').collect();
        let speaker = fields[4].to_string();
        if !speakers.contains(&speaker) {
            if speakers.len() == 2 {
                continue;
            }
            speakers.push(speaker.clone());
        }
        let count = per_speaker.entry(speaker).or_insert(0);
        if *count == 4 {
            continue;
        }
        *count += 1;
        let audio = repo("tests/data/demo").join(fields[1]);
        let name = audio.file_name().unwrap().to_string_lossy().into_owned();
        std::fs::copy(&audio, dir.join("audio").join(&name)).unwrap();
        let mut fields: Vec<String> = fields.iter().map(|f| f.to_string()).collect();
        fields[1] = format!("audio/{name}");
        kept.push(fields.join("\t"));
    }
    let manifest = dir.join("test.tsv");
    std::fs::write(&manifest, kept.join("\n") + "\n").unwrap();
    (manifest, speakers)
}

fn write_sweep(dir: &Path, model: &Path, manifest: &Path, variants: &Path) -> PathBuf {
    let sweep = format!(
        r#"out_dir = "{out}"
models = ["{model}"]
test = "{manifest}"
columns = ["dialectal", "normalized"]
variants = {{ dialectal = "{variants}" }}
seed = 3
resamples = 200
baseline = {{ lm = "two", column = "dialectal" }}

[[lm]]
name = "two"
order = 2
text = ["{train}"]

[[lm]]
name = "three"
order = 3
text = ["{train}"]

[[lexicon]]
name = "letters"
kind = "grapheme"

[decoder]
beam = [16]
lm_weight = [0.8]
word_bonus = [1.5]
"#,
        out = text(&dir.join("out")),
        model = text(model),
        manifest = text(manifest),
        variants = text(variants),
        train = text(&repo("tests/data/demo/train.{column}.txt")),
    );
    let path = dir.join("sweep.toml");
    std::fs::write(&path, sweep).unwrap();
    path
}

fn run_sweep(config: &Path) -> serde_json::Value {
    let output = isogloss(&["sweep", "--config", &text(config), "--json"]);
    serde_json::from_slice(&output.stdout).expect("sweep --json prints JSON")
}

fn hypotheses(path: &Path) -> Vec<String> {
    std::fs::read_to_string(path)
        .unwrap()
        .lines()
        .map(str::to_string)
        .collect()
}

/// The sweep chart read back from its geometry: one row per cell in grid order, named by the
/// axes that vary (writing as the heading, LM in the row, the baseline said), each bar at the
/// cell's rate with its whisker at the interval of results.json, in %, and a triangle exactly
/// where the paired difference to the baseline has an interval that excludes 0.
fn check_chart(svg: &str, cells: &[serde_json::Value]) {
    let rows = geometry::bar_rows(svg);
    assert_eq!(rows.len(), cells.len(), "one row per cell: {rows:?}");
    for heading in ["dialectal", "normalized"] {
        let line = format!("font-weight=\"bold\">{heading}</text>");
        assert!(
            svg.lines()
                .any(|l| l.contains("class=\"heading\"") && l.ends_with(&line)),
            "heading {heading}"
        );
    }
    assert!(svg.contains(
        "Every cell: model demo, letters lexicon, beam 16, LM weight 0.8, word bonus 1.5."
    ));
    for (row, cell) in rows.iter().zip(cells) {
        let mut label = cell["lm"].as_str().unwrap().to_string();
        if cell["column"] == "dialectal" && cell["lm"] == "two" {
            label.push_str(" (baseline)");
        }
        assert_eq!(row.label, label);
        let series = [
            ("WER", "wer", "wer_interval", "versus_baseline"),
            (
                "flexible WER",
                "flexible_wer",
                "flexible_wer_interval",
                "flexible_versus_baseline",
            ),
        ];
        let expected: Vec<_> = series
            .iter()
            .filter(|(_, rate, _, _)| cell["overall"][rate].is_number())
            .collect();
        assert_eq!(row.bars.len(), expected.len(), "{label}: {row:?}");
        for (bar, (name, rate, interval, versus)) in row.bars.iter().zip(expected) {
            assert_eq!(bar.series, *name);
            let percent = |v: &serde_json::Value| 100.0 * v.as_f64().unwrap();
            let interval = &cell["overall"][interval];
            let (low, high) = bar.interval.expect("a whisker on every bar");
            for (drawn, figure) in [
                (bar.value, percent(&cell["overall"][rate])),
                (low, percent(&interval["low"])),
                (high, percent(&interval["high"])),
            ] {
                assert!(
                    (drawn - figure).abs() < 0.01,
                    "{label} {name}: drawn {drawn}, results.json {figure}"
                );
            }
            let mark = cell[versus]["difference_interval"]
                .as_object()
                .and_then(|d| {
                    let (low, high) = (d["low"].as_f64().unwrap(), d["high"].as_f64().unwrap());
                    if high < 0.0 {
                        Some("lower".to_string())
                    } else if low > 0.0 {
                        Some("higher".to_string())
                    } else {
                        None
                    }
                });
            assert_eq!(bar.mark, mark, "{label} {name}");
        }
    }
}

#[test]
fn cells_equal_separate_transcribe_and_score_runs_and_caches_recompute_what_changed() {
    let dir = tempfile::tempdir().unwrap();
    let dir = dir.path();
    let model = repo("models/demo");
    let (manifest, speakers) = slice_of_test_split(dir);
    let variants = dir.join("variants.tsv");
    isogloss(&[
        "variants",
        "--manifest",
        &text(&repo("tests/data/demo/train.tsv")),
        "--from",
        "dialectal",
        "--to",
        "normalized",
        "--out",
        &text(&variants),
    ]);
    let config = write_sweep(dir, &model, &manifest, &variants);

    let results = run_sweep(&config);
    let cells = results["cells"].as_array().unwrap();
    assert_eq!(cells.len(), 4);
    assert_eq!(results["acoustic_runs"], 8);
    assert_eq!(results["cells_decoded"], 4);
    check_chart(
        &std::fs::read_to_string(dir.join("out/chart.svg")).unwrap(),
        cells,
    );

    for cell in cells {
        let column = cell["column"].as_str().unwrap();
        let order = if cell["lm"] == "two" { "2" } else { "3" };
        // The same LM, built by the command line.
        let arpa = dir.join(format!("{column}.{order}.arpa"));
        isogloss(&[
            "lm",
            "build",
            "--sentences",
            &text(&repo(&format!("tests/data/demo/train.{column}.txt"))),
            "--order",
            order,
            "--out",
            &text(&arpa),
        ]);
        // The grapheme lexicon of the LM's words, as the sweep makes it.
        let lm = ArpaModel::read(&arpa).unwrap();
        let words = lm_words(&lm);
        let lexicon = dir.join(format!("{column}.{order}.lexicon.tsv"));
        Lexicon::graphemes(words.iter().map(String::as_str), None)
            .write(&lexicon)
            .unwrap();
        let hyp = dir.join(format!("{column}.{order}.hyp.tsv"));
        isogloss(&[
            "transcribe",
            "--model",
            &text(&model),
            "--lm",
            &text(&arpa),
            "--lexicon",
            &text(&lexicon),
            "--manifest",
            &text(&manifest),
            "--out",
            &text(&hyp),
            "--beam",
            "16",
            "--lm-weight",
            "0.8",
            "--word-bonus",
            "1.5",
        ]);
        let cell_hyp = PathBuf::from(cell["hypotheses"].as_str().unwrap());
        assert_eq!(
            hypotheses(&hyp),
            hypotheses(&cell_hyp),
            "cell {column} order {order}"
        );

        let mut score_args = vec![
            "score".to_string(),
            "--ref".into(),
            text(&manifest),
            "--column".into(),
            column.into(),
            "--hyp".into(),
            text(&hyp),
            "--json".into(),
        ];
        if column == "dialectal" {
            score_args.extend(["--variants".into(), text(&variants)]);
        }
        let args: Vec<&str> = score_args.iter().map(String::as_str).collect();
        let scored: serde_json::Value = serde_json::from_slice(&isogloss(&args).stdout).unwrap();
        assert_eq!(
            scored["wer"], cell["overall"]["wer"],
            "cell {column} order {order}"
        );
        assert_eq!(scored["ref_words"], cell["overall"]["ref_words"]);
        if column == "dialectal" {
            assert_eq!(scored["flexible_wer"], cell["overall"]["flexible_wer"]);
        }
    }

    // Nothing changed: everything comes from the caches.
    let again = run_sweep(&config);
    assert_eq!(again["acoustic_runs"], 0);
    assert_eq!(again["cells_decoded"], 0);
    assert_eq!(again["cells"], results["cells"]);

    // One recording of the first speaker changes: that speaker's four utterances are
    // recomputed (per-speaker statistics may depend on every one of them), nobody else's.
    let first_speaker_audio = std::fs::read_to_string(&manifest)
        .unwrap()
        .lines()
        .skip(1)
        .find(|line| line.split('\t').nth(4) == Some(speakers[0].as_str()))
        .map(|line| dir.join(line.split('\t').nth(1).unwrap()))
        .unwrap();
    let other_audio = std::fs::read_dir(dir.join("audio"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| *p != first_speaker_audio)
        .unwrap();
    std::fs::copy(&other_audio, &first_speaker_audio).unwrap();
    let changed = run_sweep(&config);
    assert_eq!(changed["acoustic_runs"], 4);
    assert_eq!(changed["cells_decoded"], 4);

    // A changed model recomputes every utterance.
    let copy = dir.join("model-copy");
    std::fs::create_dir_all(&copy).unwrap();
    std::fs::copy(
        model.join("model.safetensors"),
        copy.join("model.safetensors"),
    )
    .unwrap();
    let toml = std::fs::read_to_string(model.join("model.toml")).unwrap();
    std::fs::write(copy.join("model.toml"), toml + "\n# a copy\n").unwrap();
    let config = write_sweep(dir, &copy, &manifest, &variants);
    let other_model = run_sweep(&config);
    assert_eq!(other_model["acoustic_runs"], 8);
}

#[test]
fn the_shipped_demo_sweep_reads_and_pairs_each_model_with_its_lexicon() {
    let sweep = isogloss_sweep::Sweep::read(&repo("configs/sweep-demo.toml"))
        .unwrap_or_else(|e| panic!("configs/sweep-demo.toml: {e}"));
    assert_eq!(sweep.columns, ["dialectal", "normalized"]);
    assert_eq!(sweep.lms.len(), 16);
    assert_eq!(sweep.lexicons.len(), 2);
    // 2 models × 2 writings × 16 LMs × 2 lexicons; the sweep leaves out the 64 pairs whose units
    // do not fit (grapheme model × phone lexicon and the reverse) when it runs.
    assert_eq!(sweep.cells().len(), 128);
    let units = |dir: &str| {
        isogloss_acoustic::AcousticModel::load(&repo(dir))
            .unwrap()
            .units()
            .to_vec()
    };
    let (graphemes, phones) = (units("models/demo"), units("models/demo-phones"));
    assert!(graphemes.iter().any(|u| u == "a"));
    // Every phone the shipped rule lexicon uses is a unit of the phone model.
    let rules = Lexicon::read(&repo("models/demo-lm/lexicon-rules.tsv")).unwrap();
    for (word, pronunciation) in &rules.entries {
        for phone in pronunciation {
            assert!(
                phones.contains(phone),
                "{word}: phone {phone} is not a unit of models/demo-phones"
            );
        }
    }
}

/// A sweep of the shipped model over `manifest` with one good cell (LM `two`, lexicon
/// `letters`, one decoder setting) and whatever `extra` adds (another `[[lm]]` or
/// `[[lexicon]]`), into `dir/out`. Returns the sweep file.
fn sweep_beside_a_good_cell(dir: &Path, manifest: &Path, extra: &str) -> PathBuf {
    let config = dir.join("sweep.toml");
    std::fs::write(
        &config,
        format!(
            r#"out_dir = "{out}"
models = ["{model}"]
test = "{manifest}"
columns = ["dialectal"]
resamples = 100

[[lm]]
name = "two"
order = 2
text = ["{train}"]

[[lexicon]]
name = "letters"
kind = "grapheme"

{extra}
[decoder]
beam = [16]
lm_weight = [0.8]
word_bonus = [1.5]
"#,
            out = text(&dir.join("out")),
            model = text(&repo("models/demo")),
            manifest = text(manifest),
            train = text(&repo("tests/data/demo/train.{column}.txt")),
        ),
    )
    .unwrap();
    config
}

/// `isogloss sweep --config CONFIG --json`, whatever its exit code.
fn sweep_output(config: &Path) -> Output {
    Command::new(env!("CARGO_BIN_EXE_isogloss"))
        .args(["sweep", "--config", &text(config), "--json"])
        .output()
        .expect("the isogloss binary runs")
}

/// Issue 16: a cell whose LM file is damaged fails alone. The other cell is decoded, scored and
/// written; every output marks the failed cell with its reason (naming the file); the failures
/// are listed at the end and the exit code is 2 (docs/exit-codes.md). Once the file is repaired,
/// a new run decodes only the cell that failed.
#[test]
fn a_cell_with_a_damaged_lm_fails_alone_and_the_others_are_written() {
    let dir = tempfile::tempdir().unwrap();
    let dir = dir.path();
    let (manifest, _) = slice_of_test_split(dir);
    // A header count far beyond what the file can hold (docs/limits.md).
    let broken = dir.join("broken.arpa");
    std::fs::write(
        &broken,
        "\\data\\\nngram 1=99999999999\n\n\\1-grams:\n-1.0\ta\n\n\\end\\\n",
    )
    .unwrap();
    let config = sweep_beside_a_good_cell(
        dir,
        &manifest,
        &format!("[[lm]]\nname = \"broken\"\nfile = \"{}\"\n", text(&broken)),
    );
    let sweep = || sweep_output(&config);

    let output = sweep();
    let stderr = String::from_utf8_lossy(&output.stderr).into_owned();
    assert_eq!(output.status.code(), Some(2), "{stderr}");
    let label = "demo dialectal lm=broken lexicon=letters beam=16 lm-weight=0.8 word-bonus=1.5";
    let listed = stderr
        .split_once("1 of 2 cells failed")
        .unwrap_or_else(|| panic!("no list of failures:\n{stderr}"))
        .1;
    assert!(
        listed.contains(&format!("  {label}: LM broken: {}", text(&broken))),
        "{stderr}"
    );
    let results: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    assert_eq!(results, {
        let written = std::fs::read_to_string(dir.join("out/results.json")).unwrap();
        serde_json::from_str::<serde_json::Value>(&written).unwrap()
    });
    let cells = results["cells"].as_array().unwrap();
    assert_eq!(cells.len(), 1);
    assert_eq!(cells[0]["lm"], "two");
    assert!(cells[0]["overall"]["wer"].is_number());
    assert!(PathBuf::from(cells[0]["hypotheses"].as_str().unwrap()).exists());
    let failed = results["failed"].as_array().unwrap();
    assert_eq!(failed.len(), 1);
    assert_eq!(failed[0]["lm"], "broken");
    let reason = failed[0]["reason"].as_str().unwrap();
    assert!(
        reason.starts_with(&format!("LM broken: {}", text(&broken)))
            && reason.contains("99999999999"),
        "{reason}"
    );

    let csv = std::fs::read_to_string(dir.join("out/results.csv")).unwrap();
    let mut lines = csv.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    assert_eq!(header.last(), Some(&"failure"));
    let rows: Vec<Vec<String>> = lines.map(split_csv).collect();
    let failure = header.iter().position(|h| *h == "failure").unwrap();
    let wer = header.iter().position(|h| *h == "wer").unwrap();
    assert!(rows.iter().all(|r| r.len() == header.len()), "{csv}");
    let broken_rows: Vec<&Vec<String>> = rows.iter().filter(|r| r[2] == "broken").collect();
    assert_eq!(broken_rows.len(), 1, "{csv}");
    assert_eq!(broken_rows[0][failure], reason);
    assert_eq!(broken_rows[0][wer], "");
    assert!(rows
        .iter()
        .filter(|r| r[2] == "two")
        .all(|r| r[failure].is_empty() && !r[wer].is_empty()));

    let markdown = std::fs::read_to_string(dir.join("out/results.md")).unwrap();
    assert!(markdown.contains("**1 cell(s) failed**"), "{markdown}");
    assert!(
        markdown.lines().any(
            |l| l.starts_with("| demo | dialectal | broken | letters | 16 |")
                && l.contains("| failed | failed |")
                && l.contains(text(&broken).as_str())
        ),
        "{markdown}"
    );

    let svg = std::fs::read_to_string(dir.join("out/chart.svg")).unwrap();
    assert_eq!(
        geometry::bar_rows(&svg).len(),
        1,
        "only the cell with figures is drawn"
    );
    assert!(svg.contains("Failed, so not drawn (1; reasons in"), "{svg}");
    assert!(svg.contains("lm=broken"), "{svg}");

    // Repaired: only the failed cell is decoded; the other comes from the cache.
    isogloss(&[
        "lm",
        "build",
        "--sentences",
        &text(&repo("tests/data/demo/train.dialectal.txt")),
        "--order",
        "1",
        "--out",
        &text(&broken),
    ]);
    let output = sweep();
    assert_eq!(
        output.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
    let again: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    assert_eq!(again["cells"].as_array().unwrap().len(), 2);
    assert_eq!(again["cells_decoded"], 1);
    assert_eq!(again["failed"].as_array().unwrap().len(), 0);
    assert_eq!(again["cells"][0]["overall"], cells[0]["overall"]);
}

/// Issue 16: a cell whose lexicon file is damaged (a line without the tab) fails alone, with
/// the file and the line in its reason; the other cell is decoded and written, the failure is
/// listed at the end, marked in `results.csv`, and the exit code is 2.
#[test]
fn a_cell_with_a_damaged_lexicon_fails_alone_naming_the_line() {
    let dir = tempfile::tempdir().unwrap();
    let dir = dir.path();
    let (manifest, _) = slice_of_test_split(dir);
    let broken = dir.join("broken.tsv");
    std::fs::write(&broken, "hens\th e n s\nbroken line without a tab\n").unwrap();
    let config = sweep_beside_a_good_cell(
        dir,
        &manifest,
        &format!(
            "[[lexicon]]\nname = \"broken\"\nkind = \"file\"\npath = \"{}\"\n",
            text(&broken)
        ),
    );
    let output = sweep_output(&config);
    let stderr = String::from_utf8_lossy(&output.stderr).into_owned();
    assert_eq!(output.status.code(), Some(2), "{stderr}");
    let reason = format!(
        "lexicon broken: {}, line 2: expected at least 2 tab-separated fields, found 1",
        text(&broken)
    );
    let listed = stderr
        .split_once("1 of 2 cells failed")
        .unwrap_or_else(|| panic!("no list of failures:\n{stderr}"))
        .1;
    assert!(
        listed.contains(&format!(
            "  demo dialectal lm=two lexicon=broken beam=16 lm-weight=0.8 word-bonus=1.5: {reason}"
        )),
        "{stderr}"
    );
    let results: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    let cells = results["cells"].as_array().unwrap();
    assert_eq!(cells.len(), 1);
    assert_eq!(cells[0]["lexicon"], "letters");
    assert!(cells[0]["overall"]["wer"].is_number());
    let failed = results["failed"].as_array().unwrap();
    assert_eq!(failed.len(), 1);
    assert_eq!(failed[0]["lexicon"], "broken");
    assert_eq!(failed[0]["reason"], reason.as_str());
    let csv = std::fs::read_to_string(dir.join("out/results.csv")).unwrap();
    let mut lines = csv.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let (lexicon, failure) = (
        header.iter().position(|h| *h == "lexicon").unwrap(),
        header.iter().position(|h| *h == "failure").unwrap(),
    );
    let rows: Vec<Vec<String>> = lines.map(split_csv).collect();
    let broken_rows: Vec<&Vec<String>> = rows.iter().filter(|r| r[lexicon] == "broken").collect();
    assert_eq!(broken_rows.len(), 1, "{csv}");
    assert_eq!(broken_rows[0][failure], reason);
    assert!(rows
        .iter()
        .filter(|r| r[lexicon] == "letters")
        .all(|r| r[failure].is_empty()));
}

/// One CSV line split into fields (quoted fields may hold commas and doubled quotes).
fn split_csv(line: &str) -> Vec<String> {
    let mut fields = vec![String::new()];
    let mut quoted = false;
    let mut chars = line.chars().peekable();
    while let Some(c) = chars.next() {
        match (c, quoted) {
            ('"', true) if chars.peek() == Some(&'"') => {
                chars.next();
                fields.last_mut().unwrap().push('"');
            }
            ('"', _) => quoted = !quoted,
            (',', false) => fields.push(String::new()),
            _ => fields.last_mut().unwrap().push(c),
        }
    }
    fields
}
