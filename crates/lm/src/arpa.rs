//! Reading and writing the ARPA back-off format (plain or gzip-compressed).
//!
//! The reader streams the file line by line (no whole-file buffer), checks that every section
//! holds exactly the number of n-grams the `\data\` header announced, that the file ends with
//! `\end\`, and that every field is what it should be; each problem is reported with its line.
//! A listed n-gram whose prefix or suffix is missing (some pruning tools leave such files) gets
//! that prefix or suffix added with the probability back-off already gave it, which changes no
//! probability and keeps the query structure's invariant; [`ArpaModel::implied_ngrams`] counts them.

use std::fs::File;
use std::io::{BufRead, BufReader, BufWriter, Read, Write};
use std::path::{Path, PathBuf};

use flate2::read::MultiGzDecoder;
use flate2::write::GzEncoder;

use crate::error::LmError;
use crate::model::{AddError, ArpaModel, ModelBuilder, MAX_ENTRIES_PER_ORDER, MAX_ORDER};

/// Opens a file for reading, transparently decompressing gzip (recognised by its magic bytes).
pub(crate) fn open_text(path: &Path) -> Result<Box<dyn BufRead>, LmError> {
    Ok(wrap_text(open_text_raw(path)?))
}

const GZIP_MAGIC: [u8; 2] = [0x1f, 0x8b];

fn open_text_raw(path: &Path) -> Result<BufReader<File>, LmError> {
    let file = File::open(path).map_err(|error| LmError::io(path, "cannot open", error))?;
    Ok(BufReader::with_capacity(1 << 16, file))
}

/// Decompresses gzip (recognised by its magic bytes) or passes the text through.
fn wrap_text(mut reader: BufReader<File>) -> Box<dyn BufRead> {
    let compressed = reader
        .fill_buf()
        .is_ok_and(|magic| magic.starts_with(&GZIP_MAGIC));
    if compressed {
        Box::new(BufReader::with_capacity(
            1 << 16,
            MultiGzDecoder::new(reader),
        ))
    } else {
        Box::new(reader)
    }
}

/// Longest line the text readers accept (bytes): far beyond any n-gram or sentence, small
/// enough that a compressed file of one endless line cannot exhaust memory.
pub const MAX_LINE_BYTES: usize = 1 << 20;

/// Fewest bytes one n-gram line of an ARPA file takes (`p w` and a line end), so a plain file of
/// B bytes lists at most B / 4 n-grams: a header count beyond it is an error before anything is
/// read.
const MIN_NGRAM_LINE_BYTES: u64 = 4;

/// [`open_text`], and the file's size when it is plain text (not compressed).
fn open_text_sized(path: &Path) -> Result<(Box<dyn BufRead>, Option<u64>), LmError> {
    let mut reader = open_text_raw(path)?;
    let compressed = reader
        .fill_buf()
        .map_err(|error| LmError::io(path, "cannot read", error))?
        .starts_with(&GZIP_MAGIC);
    let size = std::fs::metadata(path)
        .map_err(|error| LmError::io(path, "cannot read", error))?
        .len();
    let size = (!compressed).then_some(size);
    Ok((wrap_text(reader), size))
}

/// Reads lines into a reused buffer, counting them and turning bad UTF-8 into a located error.
pub(crate) struct LineReader<R> {
    reader: R,
    path: PathBuf,
    bytes: Vec<u8>,
    /// 1-based number of the line last read.
    pub(crate) line: usize,
}

impl<R: BufRead> LineReader<R> {
    pub(crate) fn new(reader: R, path: &Path) -> Self {
        LineReader {
            reader,
            path: path.to_path_buf(),
            bytes: Vec::with_capacity(256),
            line: 0,
        }
    }

    /// The next line without its line ending, or `None` at the end of the file. A line longer
    /// than [`MAX_LINE_BYTES`] is an error (a decompressed stream has no size to bound it).
    pub(crate) fn next_line(&mut self) -> Result<Option<&str>, LmError> {
        self.bytes.clear();
        let mut ended = false;
        loop {
            let available = self
                .reader
                .fill_buf()
                .map_err(|error| LmError::io(&self.path, "cannot read", error))?;
            if available.is_empty() {
                break;
            }
            let (taken, found) = match available.iter().position(|&b| b == b'\n') {
                Some(at) => (at + 1, true),
                None => (available.len(), false),
            };
            if self.bytes.len() + taken > MAX_LINE_BYTES {
                return Err(LmError::Text {
                    path: self.path.clone(),
                    line: self.line + 1,
                    message: format!(
                        "expected lines of at most {MAX_LINE_BYTES} bytes, found a longer one"
                    ),
                });
            }
            self.bytes.extend_from_slice(&available[..taken]);
            self.reader.consume(taken);
            if found {
                ended = true;
                break;
            }
        }
        if self.bytes.is_empty() && !ended {
            return Ok(None);
        }
        self.line += 1;
        while matches!(self.bytes.last(), Some(b'\n' | b'\r')) {
            self.bytes.pop();
        }
        match std::str::from_utf8(&self.bytes) {
            Ok(text) => Ok(Some(text)),
            Err(error) => Err(LmError::Text {
                path: self.path.clone(),
                line: self.line,
                message: format!(
                    "expected UTF-8 text, found an invalid byte at column {}",
                    error.valid_up_to() + 1
                ),
            }),
        }
    }
}

fn arpa_error(path: &Path, line: usize, message: String) -> LmError {
    LmError::Arpa {
        path: path.to_path_buf(),
        line,
        message,
    }
}

fn parse_log10(field: &str, what: &str, path: &Path, line: usize) -> Result<f64, LmError> {
    match field.parse::<f64>() {
        Ok(value) if !value.is_nan() && value != f64::INFINITY => Ok(value),
        _ => Err(arpa_error(
            path,
            line,
            format!("expected a log10 {what} (a number), found '{field}'"),
        )),
    }
}

impl ArpaModel {
    /// Reads an ARPA file (`.arpa`, or gzip-compressed such as `.arpa.gz`), streaming.
    pub fn read(path: impl AsRef<Path>) -> Result<ArpaModel, LmError> {
        let path = path.as_ref();
        let (reader, size) = open_text_sized(path)?;
        read_arpa(reader, path, size)
    }

    /// Reads ARPA text from any reader; `path` is only used in error messages.
    pub fn read_from(reader: impl Read, path: impl AsRef<Path>) -> Result<ArpaModel, LmError> {
        read_arpa(BufReader::new(reader), path.as_ref(), None)
    }
}

/// `text_bytes`: the size of the text when known (a plain file), which bounds the counts the
/// header may announce.
fn read_arpa(
    reader: impl BufRead,
    path: &Path,
    text_bytes: Option<u64>,
) -> Result<ArpaModel, LmError> {
    let mut lines = LineReader::new(reader, path);
    // Anything before `\data\` is free-form commentary.
    loop {
        match lines.next_line()? {
            None => {
                return Err(arpa_error(
                    path,
                    lines.line,
                    "expected a '\\data\\' line, found the end of the file".to_string(),
                ))
            }
            Some(line) if line.trim() == "\\data\\" => break,
            Some(_) => {}
        }
    }
    // The header: `ngram N=COUNT` lines, then the first section.
    let mut counts: Vec<usize> = Vec::new();
    let header_line;
    loop {
        let line_number = lines.line + 1;
        let Some(line) = lines.next_line()? else {
            return Err(arpa_error(
                path,
                lines.line,
                "expected '\\1-grams:' after the '\\data\\' header, found the end of the file"
                    .to_string(),
            ));
        };
        let line = line.trim();
        if line.is_empty() {
            continue;
        }
        if line.starts_with('\\') {
            header_line = Some((line.to_string(), line_number));
            break;
        }
        let declaration = line
            .strip_prefix("ngram ")
            .map(str::trim)
            .and_then(|rest| rest.split_once('='));
        let Some((order, count)) = declaration else {
            return Err(arpa_error(
                path,
                line_number,
                format!("expected 'ngram N=COUNT', found '{line}'"),
            ));
        };
        let order: usize = order.trim().parse().map_err(|_| {
            arpa_error(
                path,
                line_number,
                format!("expected an n-gram order in 'ngram N=COUNT', found '{line}'"),
            )
        })?;
        let count: u64 = count.trim().parse().map_err(|_| {
            arpa_error(
                path,
                line_number,
                format!("expected an n-gram count in 'ngram N=COUNT', found '{line}'"),
            )
        })?;
        let most = match text_bytes {
            Some(bytes) => (bytes / MIN_NGRAM_LINE_BYTES).min(MAX_ENTRIES_PER_ORDER as u64),
            None => MAX_ENTRIES_PER_ORDER as u64,
        };
        if count > most {
            let why = match text_bytes {
                Some(bytes) => format!("a file of {bytes} bytes holds at most {most}"),
                None => format!("at most {most} n-grams of one order are supported"),
            };
            return Err(arpa_error(
                path,
                line_number,
                format!("the header announces {count} n-grams of order {order}; {why}"),
            ));
        }
        let count = count as usize;
        if order != counts.len() + 1 {
            return Err(arpa_error(
                path,
                line_number,
                format!(
                    "expected the count of {}-grams, found 'ngram {order}=…'",
                    counts.len() + 1
                ),
            ));
        }
        if order > MAX_ORDER {
            return Err(arpa_error(
                path,
                line_number,
                format!("n-gram order {order} is not supported: expected 1 to {MAX_ORDER}"),
            ));
        }
        counts.push(count);
    }
    if counts.is_empty() {
        return Err(arpa_error(
            path,
            lines.line,
            "expected at least 'ngram 1=COUNT' in the '\\data\\' header, found none".to_string(),
        ));
    }
    let order = counts.len();
    let mut builder = ModelBuilder::new(&counts);
    let mut section = header_line;
    let mut words: Vec<u32> = Vec::with_capacity(MAX_ORDER);
    // ARPA files list n-grams sorted, so consecutive lines share leading words: remember the
    // previous line's words and prefix indices to skip most vocabulary and table look-ups.
    let mut previous_text: Vec<String> = Vec::with_capacity(MAX_ORDER);
    let mut previous_words: Vec<u32> = Vec::with_capacity(MAX_ORDER);
    let mut prefix_ids: Vec<u32> = Vec::with_capacity(MAX_ORDER);
    for n in 1..=order {
        let Some((header, header_number)) = section.take() else {
            return Err(arpa_error(
                path,
                lines.line,
                format!("expected the '\\{n}-grams:' section, found the end of the file"),
            ));
        };
        if header != format!("\\{n}-grams:") {
            return Err(arpa_error(
                path,
                header_number,
                format!("expected '\\{n}-grams:', found '{header}'"),
            ));
        }
        let mut listed = 0usize;
        previous_text.clear();
        previous_words.clear();
        prefix_ids.clear();
        loop {
            let line_number = lines.line + 1;
            let Some(line) = lines.next_line()? else {
                break;
            };
            let trimmed = line.trim();
            if trimmed.is_empty() {
                continue;
            }
            if trimmed.starts_with('\\') {
                section = Some((trimmed.to_string(), line_number));
                break;
            }
            listed += 1;
            if listed > counts[n - 1] {
                return Err(arpa_error(
                    path,
                    line_number,
                    format!(
                        "the '\\data\\' header announced {} {n}-grams, found more",
                        counts[n - 1]
                    ),
                ));
            }
            let mut fields = trimmed.split_ascii_whitespace();
            let probability = fields.next().unwrap_or_default();
            let log10_prob = parse_log10(probability, "probability", path, line_number)?;
            words.clear();
            let mut text_of_ngram = String::new();
            let mut shared = 0; // leading words equal to the previous line's
            #[allow(clippy::needless_range_loop)] // `position` also counts the words found so far
            for position in 0..n {
                let Some(word) = fields.next() else {
                    return Err(arpa_error(
                        path,
                        line_number,
                        format!(
                            "expected a probability and {n} words, found only {} words",
                            position
                        ),
                    ));
                };
                if n == 1 {
                    text_of_ngram.push_str(word);
                    continue;
                }
                if shared == position
                    && previous_text
                        .get(position)
                        .is_some_and(|previous| previous == word)
                {
                    words.push(previous_words[position]);
                    shared += 1;
                    continue;
                }
                let Some(index) = builder.word(word) else {
                    return Err(arpa_error(
                        path,
                        line_number,
                        format!("word '{word}' is not in the unigram list; expected every word of an n-gram to be a unigram"),
                    ));
                };
                words.push(index);
            }
            let log10_backoff = match fields.next() {
                Some(field) if n < order => parse_log10(field, "back-off weight", path, line_number)?,
                Some(field) => {
                    return Err(arpa_error(
                        path,
                        line_number,
                        format!("expected no back-off weight on a {n}-gram of the highest order, found '{field}'"),
                    ))
                }
                None => 0.0,
            };
            if let Some(extra) = fields.next() {
                return Err(arpa_error(path, line_number, format!("expected at most a back-off weight after the {n} words, found also '{extra}'")));
            }
            let added = if n == 1 {
                builder.add_unigram(&text_of_ngram, log10_prob, log10_backoff)
            } else {
                prefix_ids.truncate(shared.min(n - 1));
                let mut missing = None;
                while prefix_ids.len() < n - 1 {
                    let length = prefix_ids.len();
                    let id = if length == 0 {
                        Some(words[0])
                    } else {
                        builder.extend(length + 1, prefix_ids[length - 1], words[length])
                    };
                    match id {
                        Some(id) => prefix_ids.push(id),
                        None => {
                            missing = Some(length + 1);
                            break;
                        }
                    }
                }
                let fast = match missing {
                    Some(length) => Err(AddError::MissingPrefix(length)),
                    None => builder.add_with_prefix(
                        n,
                        prefix_ids[n - 2],
                        words[n - 1],
                        log10_prob,
                        log10_backoff,
                    ),
                };
                match fast {
                    // Not closed under prefixes and suffixes: imply the missing entries.
                    Err(AddError::MissingPrefix(_) | AddError::MissingSuffix) => {
                        prefix_ids.clear();
                        builder.add_ngram_implying(&words, log10_prob, log10_backoff)
                    }
                    other => other,
                }
            };
            if n > 1 {
                previous_text.clear();
                previous_text.extend(
                    trimmed
                        .split_ascii_whitespace()
                        .skip(1)
                        .take(n)
                        .map(str::to_string),
                );
                previous_words.clone_from(&words);
            }
            if let Err(problem) = added {
                let ngram: Vec<&str> = trimmed.split_ascii_whitespace().skip(1).take(n).collect();
                return Err(arpa_error(
                    path,
                    line_number,
                    problem.describe(&ngram.join(" ")),
                ));
            }
        }
        if listed != counts[n - 1] {
            let at = section.as_ref().map_or(lines.line, |(_, number)| *number);
            return Err(arpa_error(
                path,
                at,
                format!(
                    "the '\\data\\' header announced {} {n}-grams, found {listed}",
                    counts[n - 1]
                ),
            ));
        }
    }
    match section {
        Some((header, _)) if header == "\\end\\" => {}
        Some((header, number)) => {
            return Err(arpa_error(
                path,
                number,
                format!("expected '\\end\\' after the {order}-grams, found '{header}'"),
            ))
        }
        None => {
            return Err(arpa_error(
                path,
                lines.line,
                "expected '\\end\\', found the end of the file".to_string(),
            ))
        }
    }
    debug_assert_eq!(builder.order(), order);
    Ok(builder.finish())
}

/// Appends a log10 value with eight decimals (enough that probabilities written and read back
/// sum to one within 1e-7); `-99` stands for log10 0, as is common practice in ARPA files.
pub(crate) fn push_log10(line: &mut Vec<u8>, value: f64) {
    if value <= -99.0 || value.is_nan() {
        line.extend_from_slice(b"-99");
        return;
    }
    let scaled = (value.abs() * 1e8).round() as u64;
    if scaled == 0 {
        line.push(b'0');
        return;
    }
    if value < 0.0 {
        line.push(b'-');
    }
    let whole = scaled / 100_000_000;
    let fraction = scaled % 100_000_000;
    let mut digits = [0u8; 20];
    let mut length = 0;
    let mut rest = whole;
    loop {
        digits[length] = b'0' + (rest % 10) as u8;
        length += 1;
        rest /= 10;
        if rest == 0 {
            break;
        }
    }
    line.extend(digits[..length].iter().rev());
    line.push(b'.');
    let mut fraction_digits = [b'0'; 8];
    let mut rest = fraction;
    for digit in fraction_digits.iter_mut().rev() {
        *digit = b'0' + (rest % 10) as u8;
        rest /= 10;
    }
    line.extend_from_slice(&fraction_digits);
}

/// Appends one ARPA entry line: probability, tab, words separated by spaces, optional back-off.
pub(crate) fn push_entry<'w>(
    line: &mut Vec<u8>,
    log10_prob: f64,
    words: impl Iterator<Item = &'w str>,
    log10_backoff: Option<f64>,
) {
    push_log10(line, log10_prob);
    for (index, word) in words.enumerate() {
        line.push(if index == 0 { b'\t' } else { b' ' });
        line.extend_from_slice(word.as_bytes());
    }
    if let Some(backoff) = log10_backoff {
        line.push(b'\t');
        push_log10(line, backoff);
    }
    line.push(b'\n');
}

/// Writes the `\data\` header.
pub(crate) fn write_header(writer: &mut dyn Write, counts: &[usize]) -> std::io::Result<()> {
    writeln!(writer, "\\data\\")?;
    for (position, count) in counts.iter().enumerate() {
        writeln!(writer, "ngram {}={count}", position + 1)?;
    }
    Ok(())
}

/// Writes a file under a temporary name and renames it, so a failure leaves no half file; a path
/// ending in `.gz` is gzip-compressed.
pub(crate) fn write_atomically(
    path: &Path,
    write: impl FnOnce(&mut dyn Write) -> std::io::Result<()>,
) -> Result<(), LmError> {
    let temporary = path.with_file_name(format!(
        ".{}.partial",
        path.file_name()
            .map(|name| name.to_string_lossy())
            .unwrap_or_default()
    ));
    let file = File::create(&temporary)
        .map_err(|error| LmError::io(&temporary, "cannot create", error))?;
    let compressed = path.extension().is_some_and(|extension| extension == "gz");
    let result = if compressed {
        let mut encoder = GzEncoder::new(
            BufWriter::with_capacity(1 << 20, file),
            flate2::Compression::fast(),
        );
        write(&mut encoder).and_then(|()| encoder.finish()?.flush())
    } else {
        let mut writer = BufWriter::with_capacity(1 << 20, file);
        write(&mut writer).and_then(|()| writer.flush())
    };
    if let Err(error) = result {
        let _ = std::fs::remove_file(&temporary);
        return Err(LmError::io(path, "cannot write", error));
    }
    std::fs::rename(&temporary, path).map_err(|error| LmError::io(path, "cannot write", error))
}

impl ArpaModel {
    /// Writes the model as ARPA text; a path ending in `.gz` is gzip-compressed.
    /// The file is written under a temporary name and renamed, so a failure leaves no half file.
    pub fn write_arpa(&self, path: impl AsRef<Path>) -> Result<(), LmError> {
        write_atomically(path.as_ref(), |writer| self.write_arpa_to(writer))
    }

    /// Writes the model as ARPA text to any writer.
    pub fn write_arpa_to(&self, writer: &mut dyn Write) -> std::io::Result<()> {
        let counts = self.ngram_counts();
        write_header(writer, &counts)?;
        let order = self.order();
        let mut words = Vec::with_capacity(order);
        let vocabulary = self.words();
        let mut line = Vec::with_capacity(256);
        for (position, &count) in counts.iter().enumerate() {
            let n = position + 1;
            writeln!(writer, "\n\\{n}-grams:")?;
            for id in 0..count as u32 {
                let (log10_prob, log10_backoff) = self.entry_values(n, id);
                self.ngram_words(n, id, &mut words);
                line.clear();
                push_entry(
                    &mut line,
                    log10_prob,
                    words.iter().map(|&word| vocabulary[word as usize].as_str()),
                    (n < order).then_some(log10_backoff),
                );
                writer.write_all(&line)?;
            }
        }
        writeln!(writer, "\n\\end\\")
    }
}

#[cfg(test)]
mod tests {
    use super::push_log10;

    #[test]
    fn log10_values_are_written_with_eight_decimals() {
        for (value, expected) in [
            (-0.5, "-0.50000000"),
            (-12.345678912, "-12.34567891"),
            (0.0, "0"),
            (-0.000000001, "0"),
            (-99.0, "-99"),
            (f64::NEG_INFINITY, "-99"),
            (0.25, "0.25000000"),
        ] {
            let mut line = Vec::new();
            push_log10(&mut line, value);
            assert_eq!(String::from_utf8(line).unwrap(), expected);
        }
    }
}
