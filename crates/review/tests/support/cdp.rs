//! A minimal client for headless Chromium over the DevTools protocol on a pipe
//! (`--remote-debugging-pipe`: Chromium reads NUL-terminated JSON commands on file descriptor 3
//! and writes responses and events on 4). No WebSocket, no async runtime, no extra crates: the
//! browser test, the page-opening benchmark and the screenshot example share it.

use std::fs::File;
use std::io::{BufRead, BufReader, Write};
use std::os::fd::FromRawFd;
use std::os::unix::process::CommandExt;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::mpsc::{channel, Receiver};
use std::time::{Duration, Instant};

use serde_json::{json, Value};

/// How long any one command may take before the client gives up (the browser is local; this
/// only keeps a broken browser from hanging the test run).
const TIMEOUT: Duration = Duration::from_secs(30);

/// The Chromium binary: `ISOGLOSS_CHROMIUM`, else `chromium` or `chromium-browser` on the PATH.
pub fn find_chromium() -> Option<PathBuf> {
    if let Some(path) = std::env::var_os("ISOGLOSS_CHROMIUM") {
        return Some(PathBuf::from(path));
    }
    let path = std::env::var_os("PATH")?;
    std::env::split_paths(&path)
        .flat_map(|dir| ["chromium", "chromium-browser"].map(|name| dir.join(name)))
        .find(|candidate| candidate.is_file())
}

/// A headless Chromium with one page open.
pub struct Browser {
    child: Child,
    commands: File,
    messages: Receiver<Value>,
    next_id: u64,
    session: String,
    /// Events received and not yet consumed, in order.
    pub events: Vec<Value>,
    _profile: tempfile::TempDir,
}

fn pipe() -> (i32, i32) {
    let mut fds = [0i32; 2];
    // SAFETY: `fds` has room for the two descriptors pipe2 writes.
    let status = unsafe { libc::pipe2(fds.as_mut_ptr(), libc::O_CLOEXEC) };
    assert_eq!(status, 0, "pipe2 failed");
    (fds[0], fds[1])
}

impl Browser {
    /// Starts `chromium` headless with a fresh profile and the flags that keep it off the
    /// network, and opens a blank page with the runtime, page and log domains enabled.
    pub fn start(chromium: &Path, width: u32, height: u32) -> Browser {
        let profile = tempfile::tempdir().unwrap();
        let (to_browser_read, to_browser_write) = pipe();
        let (from_browser_read, from_browser_write) = pipe();
        let mut command = Command::new(chromium);
        command
            .args([
                "--headless",
                "--no-sandbox",
                "--disable-gpu",
                "--disable-quic",
                "--no-first-run",
                "--disable-background-networking",
                "--disable-component-update",
                "--disable-sync",
                "--mute-audio",
                "--remote-debugging-pipe",
                &format!("--window-size={width},{height}"),
            ])
            .arg(format!("--user-data-dir={}", profile.path().display()))
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(Stdio::null());
        // SAFETY: between fork and exec only async-signal-safe fcntl and dup2 calls. They place
        // the pipe ends on descriptors 3 and 4 without close-on-exec, as the pipe mode expects;
        // the ends are first moved above 10, because a pipe end that already is 3 or 4 would
        // keep its close-on-exec flag through a dup2 onto itself.
        unsafe {
            command.pre_exec(move || {
                let read = libc::fcntl(to_browser_read, libc::F_DUPFD, 10);
                let write = libc::fcntl(from_browser_write, libc::F_DUPFD, 10);
                if read < 0 || write < 0 || libc::dup2(read, 3) < 0 || libc::dup2(write, 4) < 0 {
                    return Err(std::io::Error::last_os_error());
                }
                Ok(())
            });
        }
        let child = command
            .spawn()
            .unwrap_or_else(|e| panic!("{}: cannot start: {e}", chromium.display()));
        // SAFETY: the descriptors come from pipe2 above and each is owned by exactly one File.
        let (commands, replies) = unsafe {
            libc::close(to_browser_read);
            libc::close(from_browser_write);
            (
                File::from_raw_fd(to_browser_write),
                File::from_raw_fd(from_browser_read),
            )
        };
        let (sender, messages) = channel();
        std::thread::spawn(move || {
            let mut reader = BufReader::new(replies);
            let mut buffer = Vec::new();
            while let Ok(n) = reader.read_until(0, &mut buffer) {
                if n == 0 {
                    break;
                }
                if buffer.last() == Some(&0) {
                    buffer.pop();
                }
                if let Ok(value) = serde_json::from_slice::<Value>(&buffer) {
                    if sender.send(value).is_err() {
                        break;
                    }
                }
                buffer.clear();
            }
        });
        let mut browser = Browser {
            child,
            commands,
            messages,
            next_id: 0,
            session: String::new(),
            events: Vec::new(),
            _profile: profile,
        };
        browser.session = browser.new_page("about:blank");
        browser
    }

    /// Creates a page showing `url`, attaches to it with the runtime, page and log domains
    /// enabled, and returns its session (the current page stays the current one).
    fn new_page(&mut self, url: &str) -> String {
        let current = std::mem::take(&mut self.session);
        let target = self.call("Target.createTarget", json!({ "url": url }));
        let target = target["targetId"].as_str().unwrap().to_string();
        let attached = self.call(
            "Target.attachToTarget",
            json!({ "targetId": target, "flatten": true }),
        );
        self.session = attached["sessionId"].as_str().unwrap().to_string();
        for domain in ["Runtime.enable", "Page.enable", "Log.enable"] {
            self.call(domain, json!({}));
        }
        std::mem::replace(&mut self.session, current)
    }

    /// Opens `url` in another page of the same browser (same profile, same storage) and
    /// returns its session, for [`Browser::in_page`]; the current page stays the current one.
    pub fn open_other_page(&mut self, url: &str) -> String {
        let session = self.new_page(url);
        self.in_page(&session, |page| {
            page.wait_until("location.protocol !== 'about:' && document.readyState === 'complete'")
        });
        session
    }

    /// Opens `url` in a new page, created with it (not navigated to from another page), and
    /// makes that page the current one.
    pub fn open_new_page(&mut self, url: &str) {
        self.session = self.open_other_page(url);
    }

    /// Runs `f` with the page of `session` as the current page (brought to the front, so that
    /// it has the keyboard focus), then makes the previous page current again.
    pub fn in_page<R>(&mut self, session: &str, f: impl FnOnce(&mut Browser) -> R) -> R {
        let previous = std::mem::replace(&mut self.session, session.to_string());
        self.call("Page.bringToFront", json!({}));
        let result = f(self);
        self.session = previous;
        self.call("Page.bringToFront", json!({}));
        result
    }

    /// Sends a command (to the page once attached) and waits for its result; events that
    /// arrive meanwhile are kept in [`Browser::events`]. A protocol error panics with the
    /// browser's message.
    pub fn call(&mut self, method: &str, params: Value) -> Value {
        self.next_id += 1;
        let id = self.next_id;
        let mut message = json!({ "id": id, "method": method, "params": params });
        if !self.session.is_empty() {
            message["sessionId"] = json!(self.session);
        }
        let mut bytes = serde_json::to_vec(&message).unwrap();
        bytes.push(0);
        self.commands.write_all(&bytes).unwrap();
        let deadline = Instant::now() + TIMEOUT;
        loop {
            let left = deadline.saturating_duration_since(Instant::now());
            let value = self
                .messages
                .recv_timeout(left)
                .unwrap_or_else(|_| panic!("no answer from Chromium to {method} in {TIMEOUT:?}"));
            if value["id"].as_u64() == Some(id) {
                if let Some(error) = value.get("error") {
                    panic!("Chromium refused {method}: {error}");
                }
                return value["result"].clone();
            }
            self.events.push(value);
        }
    }

    /// Waits for an event of `method` from the current page (already received or still to
    /// come) and removes it.
    pub fn wait_event(&mut self, method: &str) -> Value {
        let deadline = Instant::now() + TIMEOUT;
        loop {
            let session = self.session.as_str();
            let mine = |e: &Value| {
                e["method"] == method && (session.is_empty() || e["sessionId"] == session)
            };
            if let Some(i) = self.events.iter().position(mine) {
                return self.events.remove(i);
            }
            let left = deadline.saturating_duration_since(Instant::now());
            let value = self
                .messages
                .recv_timeout(left)
                .unwrap_or_else(|_| panic!("no {method} event from Chromium in {TIMEOUT:?}"));
            self.events.push(value);
        }
    }

    fn forget_load_events(&mut self) {
        let session = self.session.clone();
        self.events
            .retain(|e| e["method"] != "Page.loadEventFired" || e["sessionId"] != session.as_str());
    }

    /// Opens `url` and waits for its load event.
    pub fn open(&mut self, url: &str) {
        self.forget_load_events();
        let result = self.call("Page.navigate", json!({ "url": url }));
        if let Some(error) = result.get("errorText") {
            panic!("{url}: cannot open: {error}");
        }
        self.wait_event("Page.loadEventFired");
    }

    /// Reloads the page and waits for its load event.
    pub fn reload(&mut self) {
        self.forget_load_events();
        self.call("Page.reload", json!({}));
        self.wait_event("Page.loadEventFired");
    }

    /// Reloads the page until `expression` is `true` once it has loaded (or panics after the
    /// timeout), and returns the number of reloads.
    pub fn reload_until(&mut self, expression: &str) -> u32 {
        let deadline = Instant::now() + TIMEOUT;
        let mut reloads = 0;
        loop {
            self.reload();
            reloads += 1;
            if self.eval(expression) == json!(true) {
                return reloads;
            }
            assert!(
                Instant::now() < deadline,
                "still not true after {reloads} reloads: {expression}"
            );
            std::thread::sleep(Duration::from_millis(200));
        }
    }

    /// Evaluates a JavaScript expression in the page (promises awaited) and returns its value.
    /// An exception panics with its description.
    pub fn eval(&mut self, expression: &str) -> Value {
        let result = self.call(
            "Runtime.evaluate",
            json!({ "expression": expression, "returnByValue": true, "awaitPromise": true }),
        );
        if let Some(exception) = result.get("exceptionDetails") {
            panic!("{expression}: {exception}");
        }
        result["result"]["value"].clone()
    }

    /// Evaluates `expression` every 50 ms until it is `true` (or panics after the timeout).
    pub fn wait_until(&mut self, expression: &str) {
        let deadline = Instant::now() + TIMEOUT;
        while self.eval(expression) != json!(true) {
            assert!(Instant::now() < deadline, "still not true: {expression}");
            std::thread::sleep(Duration::from_millis(50));
        }
    }

    /// Clicks (or double-clicks) the middle of the first element matching `selector`, as a
    /// person would: mouse pressed and released there.
    pub fn click(&mut self, selector: &str, clicks: u32) {
        let point = self.eval(&format!(
            "(() => {{ const e = document.querySelector({selector:?}); e.scrollIntoView({{block: 'center'}}); \
             const r = e.getBoundingClientRect(); return [r.left + r.width / 2, r.top + r.height / 2]; }})()"
        ));
        let (x, y) = (point[0].as_f64().unwrap(), point[1].as_f64().unwrap());
        for count in 1..=clicks {
            for kind in ["mousePressed", "mouseReleased"] {
                self.call(
                    "Input.dispatchMouseEvent",
                    json!({ "type": kind, "x": x, "y": y, "button": "left", "clickCount": count }),
                );
            }
        }
    }

    /// Types text into the focused element.
    pub fn type_text(&mut self, text: &str) {
        self.call("Input.insertText", json!({ "text": text }));
    }

    /// Presses and releases one key (`key` as in KeyboardEvent.key, e.g. "Enter", "n").
    pub fn press(&mut self, key: &str, code: &str, key_code: u32) {
        let text = if key.chars().count() == 1 { key } else { "" };
        for kind in ["keyDown", "keyUp"] {
            let mut params = json!({ "type": kind, "key": key, "code": code,
                "windowsVirtualKeyCode": key_code, "nativeVirtualKeyCode": key_code });
            if kind == "keyDown" && !text.is_empty() {
                params["text"] = json!(text);
            }
            self.call("Input.dispatchKeyEvent", params);
        }
    }

    /// Console errors, uncaught exceptions and browser log errors seen so far.
    pub fn errors(&self) -> Vec<String> {
        self.events
            .iter()
            .filter_map(|e| match e["method"].as_str() {
                Some("Runtime.exceptionThrown") => {
                    Some(format!("exception: {}", e["params"]["exceptionDetails"]))
                }
                Some("Runtime.consoleAPICalled") if e["params"]["type"] == "error" => {
                    Some(format!("console.error: {}", e["params"]["args"]))
                }
                Some("Log.entryAdded") if e["params"]["entry"]["level"] == "error" => {
                    Some(format!("log: {}", e["params"]["entry"]))
                }
                _ => None,
            })
            .collect()
    }

    /// A PNG screenshot of the viewport.
    pub fn screenshot(&mut self) -> Vec<u8> {
        let shot = self.call("Page.captureScreenshot", json!({ "format": "png" }));
        decode_base64(shot["data"].as_str().unwrap())
    }
}

impl Drop for Browser {
    fn drop(&mut self) {
        self.session.clear();
        self.next_id += 1;
        let close = json!({ "id": self.next_id, "method": "Browser.close", "params": {} });
        let mut bytes = serde_json::to_vec(&close).unwrap();
        bytes.push(0);
        let _ = self.commands.write_all(&bytes);
        let deadline = Instant::now() + Duration::from_secs(5);
        while Instant::now() < deadline {
            if let Ok(Some(_)) = self.child.try_wait() {
                return;
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// Standard base64 (RFC 4648, section 4) to bytes.
fn decode_base64(text: &str) -> Vec<u8> {
    let value = |c: u8| -> u32 {
        match c {
            b'A'..=b'Z' => (c - b'A') as u32,
            b'a'..=b'z' => (c - b'a' + 26) as u32,
            b'0'..=b'9' => (c - b'0' + 52) as u32,
            b'+' => 62,
            b'/' => 63,
            _ => panic!("not base64: {c}"),
        }
    };
    let bytes: Vec<u8> = text.bytes().filter(|&c| c != b'=').collect();
    let mut out = Vec::with_capacity(bytes.len() * 3 / 4);
    for chunk in bytes.chunks(4) {
        let mut acc = 0u32;
        for &c in chunk {
            acc = (acc << 6) | value(c);
        }
        acc <<= 6 * (4 - chunk.len() as u32);
        let take = chunk.len() * 6 / 8;
        out.extend_from_slice(&acc.to_be_bytes()[1..1 + take]);
    }
    out
}
