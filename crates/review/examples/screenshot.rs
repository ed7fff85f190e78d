//! Opens a review page in headless Chromium, optionally clicks a word and opens it for
//! correction, and saves a PNG of the window: the README's screenshots.
//!
//! ```sh
//! cargo run --release -p isogloss-review --example screenshot -- review/interview1.html shot.png [WORD-INDEX]
//! ```

#[path = "../tests/support/cdp.rs"]
// shared by the browser test, the benchmark and the screenshot example; each uses a part
#[allow(dead_code)]
mod cdp;

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let [page, png, rest @ ..] = args.as_slice() else {
        eprintln!("usage: screenshot PAGE.html OUT.png [WORD-INDEX-TO-EDIT]");
        std::process::exit(1);
    };
    let chromium = cdp::find_chromium().unwrap_or_else(|| {
        eprintln!("no Chromium found: install Debian's `chromium` or set ISOGLOSS_CHROMIUM");
        std::process::exit(1);
    });
    let path = std::fs::canonicalize(page).unwrap_or_else(|e| {
        eprintln!("{page}: {e}");
        std::process::exit(1);
    });
    let mut browser = cdp::Browser::start(&chromium, 1200, 760);
    browser.open(&format!("file://{}", path.display()));
    browser.wait_until("typeof window.isoglossReview === 'object'");
    if let Some(word) = rest.first() {
        let selector = format!("span[data-k=\"{word}\"]");
        browser.click(&selector, 1);
        browser.eval("document.getElementById('player').pause()");
        browser.press("n", "KeyN", 78);
        browser.eval("document.getElementById('player').pause()");
        browser.eval("window.scrollTo(0, 0)");
    }
    std::fs::write(png, browser.screenshot()).unwrap_or_else(|e| {
        eprintln!("{png}: cannot write: {e}");
        std::process::exit(1);
    });
    eprintln!("wrote {png}");
}
