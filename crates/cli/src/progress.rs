//! Progress bars shared by every long-running command, so that they all look alike.

use indicatif::{ProgressBar, ProgressStyle};

/// A bar over `len` items with a short label, drawn on stderr (hidden when stderr is not a
/// terminal, so logs and CI output stay clean).
#[allow(dead_code)]
pub fn bar(len: u64, label: &str) -> ProgressBar {
    let bar = ProgressBar::new(len);
    bar.set_style(
        ProgressStyle::with_template(
            "{prefix:>12} [{bar:30}] {pos}/{len} {msg} ({elapsed} < {eta})",
        )
        .expect("the template is a valid constant")
        .progress_chars("=> "),
    );
    bar.set_prefix(label.to_string());
    bar
}
