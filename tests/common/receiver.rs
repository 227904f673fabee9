//! A webhook receiver for the alert tests: tests/tools/receiver.py, a real HTTP server that
//! checks each request's Standard Webhooks signature with the independent verifier from PyPI
//! (`standardwebhooks`) and writes one JSON line per request.

use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::time::Duration;

use serde_json::Value;

use super::wait_for;

/// A free loopback port.
pub fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

/// The receiver process and the file it writes.
pub struct Receiver {
    child: Child,
    out: std::path::PathBuf,
}

impl Receiver {
    /// A receiver verifying with `whsec`, the Standard Webhooks form of the key.
    pub fn start(port: u16, dir: &Path, whsec: &str) -> Receiver {
        let out = dir.join(format!("received-{port}.ndjson"));
        let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/tools/receiver.py");
        let child = Command::new("python3")
            .arg(script)
            .args(["--port", &port.to_string(), "--secret", whsec])
            .arg("--out")
            .arg(&out)
            .stdout(Stdio::null())
            .spawn()
            .expect("python3 tests/tools/receiver.py");
        wait_for(Duration::from_secs(10), "the receiver to listen", || {
            std::net::TcpStream::connect(("127.0.0.1", port))
                .ok()
                .map(|_| ())
        });
        Receiver { child, out }
    }

    pub fn records(&self) -> Vec<Value> {
        std::fs::read_to_string(&self.out)
            .unwrap_or_default()
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect()
    }
}

impl Drop for Receiver {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}
