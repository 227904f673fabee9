//! Headless Chromium (the Debian `chromium` package) for the dashboard tests: find it, run it
//! with a fresh profile, and read back the DOM it rendered.

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};

/// Headless Chromium, or a clear failure: browser tests are never skipped.
pub fn chromium() -> PathBuf {
    for name in ["chromium", "chromium-browser"] {
        if let Ok(out) = Command::new("sh")
            .args(["-c", &format!("command -v {name}")])
            .output()
        {
            let path = String::from_utf8_lossy(&out.stdout).trim().to_string();
            if out.status.success() && !path.is_empty() {
                return PathBuf::from(path);
            }
        }
    }
    panic!(
        "headless Chromium is required for this test and was not found on PATH; install the \
         Debian package `chromium` (tests/run.sh does this when it is missing)"
    );
}

/// Chromium for one headless run in a container: no sandbox (root), no GPU, nothing fetched
/// from the network on its own, no first-run screens, and `profile` as its own profile.
pub fn browser(profile: &Path) -> Command {
    let mut cmd = Command::new(chromium());
    cmd.args([
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--no-first-run",
        "--disable-dev-shm-usage",
    ])
    .arg(format!("--user-data-dir={}", profile.display()))
    .stderr(Stdio::null());
    cmd
}

/// The DOM of `url` as Chromium serialises it once the page has loaded (and, with
/// `budget_ms`, after that much virtual time, so page scripts had their turns).
pub fn dump_dom(url: &str, budget_ms: Option<u32>) -> String {
    let profile = tempfile::tempdir().expect("browser profile directory");
    let mut cmd = browser(profile.path());
    if let Some(ms) = budget_ms {
        cmd.arg(format!("--virtual-time-budget={ms}"));
    }
    let out = cmd
        .arg("--dump-dom")
        .arg(url)
        .output()
        .expect("run chromium");
    assert!(
        out.status.success(),
        "chromium --dump-dom {url} failed: {:?}",
        out.status
    );
    String::from_utf8(out.stdout).expect("utf-8 DOM")
}

/// The attributes of every start tag `<tag ...>` in `dom` whose attributes include all of
/// `with`. Chromium serialises attributes double-quoted with `"` escaped inside, so a small
/// scanner is enough.
pub fn tags(dom: &str, tag: &str, with: &[(&str, &str)]) -> Vec<Vec<(String, String)>> {
    let open = format!("<{tag} ");
    let mut out = Vec::new();
    let mut rest = dom;
    while let Some(i) = rest.find(&open) {
        let after = &rest[i + open.len()..];
        let end = after.find('>').unwrap_or(after.len());
        let attrs = attributes(&after[..end]);
        if with
            .iter()
            .all(|(k, v)| attrs.iter().any(|(a, b)| a == k && b == v))
        {
            out.push(attrs);
        }
        rest = &after[end..];
    }
    out
}

fn attributes(s: &str) -> Vec<(String, String)> {
    let mut out = Vec::new();
    let mut rest = s;
    while let Some(eq) = rest.find("=\"") {
        let name = rest[..eq]
            .trim()
            .rsplit(' ')
            .next()
            .unwrap_or("")
            .to_string();
        let value_start = eq + 2;
        let Some(len) = rest[value_start..].find('"') else {
            break;
        };
        out.push((name, rest[value_start..value_start + len].to_string()));
        rest = &rest[value_start + len + 1..];
    }
    out
}

/// The value of attribute `name`.
pub fn attr<'a>(attrs: &'a [(String, String)], name: &str) -> Option<&'a str> {
    attrs
        .iter()
        .find(|(k, _)| k == name)
        .map(|(_, v)| v.as_str())
}

/// The text right after the start tag that carries `marker` (an attribute written exactly as
/// serialised, e.g. `data-count="harm"`), up to the next `<`.
pub fn text_after<'a>(dom: &'a str, marker: &str) -> Option<&'a str> {
    let i = dom.find(marker)?;
    let rest = &dom[i..];
    let start = rest.find('>')? + 1;
    let end = rest[start..].find('<')?;
    Some(&rest[start..start + end])
}
