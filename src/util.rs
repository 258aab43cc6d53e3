//! Small shared helpers: hashing and thread pools.

use std::io::{self, Read};
use std::path::Path;

use sha2::{Digest, Sha256};

/// Lowercase hex sha256 of `bytes`.
pub fn sha256_hex(bytes: &[u8]) -> String {
    hex(&Sha256::digest(bytes))
}

/// Lowercase hex sha256 of a file's content, streamed.
pub fn sha256_file(path: &Path) -> io::Result<String> {
    let mut file = std::fs::File::open(path)?;
    let mut hasher = Sha256::new();
    let mut buf = vec![0u8; 1 << 16];
    loop {
        let n = file.read(&mut buf)?;
        if n == 0 {
            break;
        }
        hasher.update(&buf[..n]);
    }
    Ok(hex(&hasher.finalize()))
}

/// Lowercase hex sha256 of a value's JSON form (used for settings hashes).
pub fn sha256_json<T: serde::Serialize>(value: &T) -> String {
    sha256_hex(&serde_json::to_vec(value).expect("settings serialise to JSON"))
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

/// A rayon pool with exactly `threads` workers (at least one).
pub fn thread_pool(threads: usize) -> rayon::ThreadPool {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads.max(1))
        .build()
        .expect("rayon pool builds")
}

#[cfg(test)]
mod tests {
    #[test]
    fn sha256_of_abc_matches_fips_180_2_example() {
        // Source: FIPS 180-2, appendix B.1 (message "abc").
        assert_eq!(
            super::sha256_hex(b"abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }
}

/// A progress reporter: an indicatif bar with rate and ETA when stderr is a
/// terminal, otherwise a plain log line every ~10% (and at the end).
pub struct Progress {
    bar: Option<indicatif::ProgressBar>,
    label: String,
    total: u64,
    done: std::sync::atomic::AtomicU64,
    last_logged: std::sync::atomic::AtomicU64,
    start: std::time::Instant,
}

impl Progress {
    /// Starts a reporter for `total` units of work named `label` (e.g. "decode clips").
    pub fn new(label: &str, total: u64) -> Self {
        use std::io::IsTerminal;
        let quiet = std::env::var_os("ACTUARY_QUIET").is_some();
        let bar = (!quiet && std::io::stderr().is_terminal()).then(|| {
            let bar = indicatif::ProgressBar::new(total);
            bar.set_style(
                indicatif::ProgressStyle::with_template(
                    "{prefix:>12} [{bar:30}] {pos}/{len} {per_sec} eta {eta} {msg}",
                )
                .expect("valid template")
                .progress_chars("=> "),
            );
            bar.set_prefix(label.to_string());
            bar
        });
        Self {
            bar,
            label: label.to_string(),
            total,
            done: 0.into(),
            last_logged: 0.into(),
            start: std::time::Instant::now(),
        }
    }

    /// Records `n` more units done.
    pub fn inc(&self, n: u64) {
        use std::sync::atomic::Ordering;
        let done = self.done.fetch_add(n, Ordering::Relaxed) + n;
        if let Some(bar) = &self.bar {
            bar.inc(n);
            return;
        }
        if std::env::var_os("ACTUARY_QUIET").is_some() {
            return;
        }
        let step = (self.total / 10).max(1);
        let last = self.last_logged.load(Ordering::Relaxed);
        if done >= last + step || done == self.total {
            if self
                .last_logged
                .compare_exchange(last, done, Ordering::Relaxed, Ordering::Relaxed)
                .is_ok()
            {
                let secs = self.start.elapsed().as_secs_f64().max(1e-9);
                let rate = done as f64 / secs;
                let eta = if rate > 0.0 {
                    (self.total.saturating_sub(done)) as f64 / rate
                } else {
                    0.0
                };
                eprintln!(
                    "{}: {done}/{} ({rate:.1}/s, eta {eta:.0} s)",
                    self.label, self.total
                );
            }
        }
    }

    /// Shows a short message beside the bar (e.g. the current loss).
    pub fn message(&self, msg: String) {
        if let Some(bar) = &self.bar {
            bar.set_message(msg);
        }
    }

    /// Ends the bar.
    pub fn finish(&self) {
        if let Some(bar) = &self.bar {
            bar.finish_and_clear();
        }
    }
}
