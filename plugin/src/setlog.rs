//! The set log: a CSV timeline of a performance (level, timbre, family shares, closeness),
//! written by its own thread.
//!
//! The analysis thread hands each row over with a non-blocking `try_send`; the writer thread
//! writes and flushes every row (two a second), so closing the plugin or the host mid-set loses
//! at most the row in flight. The audio thread never touches the log.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::mpsc::{Receiver, SyncSender, TrySendError, sync_channel};
use std::thread::JoinHandle;
use std::time::{SystemTime, UNIX_EPOCH};
use weft_engine::palette::MAX_FAMILIES;
use weft_engine::windows::slug;

/// Rows that may wait for the writer (about a minute at two rows a second).
const QUEUE_ROWS: usize = 128;

/// One row of the log.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LogRow {
    /// Seconds of audio since the log started (the end of this row's half second).
    pub time_s: f64,
    /// Wall-clock time, seconds since the Unix epoch.
    pub unix_s: f64,
    /// Mean RMS level, dBFS.
    pub rms_dbfs: f32,
    /// Smoothed centroid, Hz.
    pub centroid_hz: f32,
    /// Smoothed 85 % roll-off, Hz.
    pub rolloff_hz: f32,
    /// Smoothed flatness, 0–1.
    pub flatness: f32,
    /// Smoothed flux, dB.
    pub flux_db: f32,
    /// Family shares, 0–1 (the log's families).
    pub shares: [f32; MAX_FAMILIES],
    /// Unexplained share, 0–1.
    pub unexplained: f32,
    /// Closeness to the category, 0–1; NaN (an empty cell) without a style model.
    pub closeness: f32,
}

/// A running set log.
#[derive(Debug)]
pub struct SetLog {
    tx: Option<SyncSender<LogRow>>,
    handle: Option<JoinHandle<()>>,
    rows: Arc<AtomicU64>,
    failed: Arc<AtomicBool>,
    path: PathBuf,
}

/// UTC calendar date and time of a Unix time, as `YYYY-MM-DD_HH-MM-SS` (days to civil date:
/// H. Hinnant, "chrono-Compatible Low-Level Date Algorithms", `civil_from_days`).
pub fn utc_stamp(unix_s: u64) -> String {
    let days = (unix_s / 86_400) as i64;
    let secs = unix_s % 86_400;
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + i64::from(m <= 2);
    format!(
        "{y:04}-{m:02}-{d:02}_{:02}-{:02}-{:02}",
        secs / 3600,
        secs / 60 % 60,
        secs % 60
    )
}

impl SetLog {
    /// Creates `weft-set-<UTC date and time>.csv` in `folder` (created if missing), writes the
    /// header for `families`, and starts the writer thread.
    ///
    /// # Errors
    /// When the folder or file cannot be created or the thread cannot start.
    pub fn start(folder: &Path, families: &[String]) -> std::io::Result<Self> {
        std::fs::create_dir_all(folder)?;
        let started = SystemTime::now();
        let unix = started
            .duration_since(UNIX_EPOCH)
            .map_or(0, |d| d.as_secs());
        let stamp = utc_stamp(unix);
        let mut path = folder.join(format!("weft-set-{stamp}.csv"));
        let mut n = 1;
        while path.exists() {
            n += 1;
            path = folder.join(format!("weft-set-{stamp}-{n}.csv"));
        }
        let file = File::create_new(&path)?;
        let mut out = BufWriter::new(file);
        let mut header =
            String::from("time_s,unix_s,rms_dbfs,centroid_hz,rolloff_hz,flatness,flux_db");
        for f in families.iter().take(MAX_FAMILIES) {
            header.push_str(",share_");
            header.push_str(&slug(f));
        }
        header.push_str(",unexplained,closeness\n");
        out.write_all(header.as_bytes())?;
        out.flush()?;
        let (tx, rx) = sync_channel(QUEUE_ROWS);
        let rows = Arc::new(AtomicU64::new(0));
        let failed = Arc::new(AtomicBool::new(false));
        let families = families.len().min(MAX_FAMILIES);
        let handle = {
            let (rows, failed) = (rows.clone(), failed.clone());
            std::thread::Builder::new()
                .name("weft-set-log".into())
                .spawn(move || write_rows(rx, out, families, &rows, &failed))?
        };
        Ok(Self {
            tx: Some(tx),
            handle: Some(handle),
            rows,
            failed,
            path,
        })
    }

    /// The file being written.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Rows written so far.
    pub fn rows(&self) -> u64 {
        self.rows.load(Ordering::Relaxed)
    }

    /// Whether writing failed (disk full, file removed…); the log then stops taking rows.
    pub fn failed(&self) -> bool {
        self.failed.load(Ordering::Relaxed)
    }

    /// Hands a row to the writer without waiting; false when the queue is full or the writer
    /// stopped (the row is dropped).
    pub fn push(&self, row: LogRow) -> bool {
        match &self.tx {
            Some(tx) => match tx.try_send(row) {
                Ok(()) => true,
                Err(TrySendError::Full(_) | TrySendError::Disconnected(_)) => false,
            },
            None => false,
        }
    }

    /// Stops taking rows, lets the writer finish the queue and close the file.
    pub fn stop(mut self) {
        self.close();
    }

    fn close(&mut self) {
        self.tx = None;
        if let Some(handle) = self.handle.take() {
            let _ = handle.join();
        }
    }
}

impl Drop for SetLog {
    fn drop(&mut self) {
        self.close();
    }
}

fn write_rows(
    rx: Receiver<LogRow>,
    mut out: BufWriter<File>,
    families: usize,
    rows: &AtomicU64,
    failed: &AtomicBool,
) {
    let mut line = String::with_capacity(512);
    for row in rx {
        line.clear();
        use std::fmt::Write as _;
        let _ = write!(
            line,
            "{:.3},{:.3},{:.2},{:.1},{:.1},{:.5},{:.3}",
            row.time_s,
            row.unix_s,
            row.rms_dbfs,
            row.centroid_hz,
            row.rolloff_hz,
            row.flatness,
            row.flux_db
        );
        for s in &row.shares[..families] {
            let _ = write!(line, ",{s:.4}");
        }
        let _ = write!(line, ",{:.4},", row.unexplained);
        if row.closeness.is_finite() {
            let _ = write!(line, "{:.4}", row.closeness);
        }
        line.push('\n');
        if out
            .write_all(line.as_bytes())
            .and_then(|()| out.flush())
            .is_err()
        {
            failed.store(true, Ordering::Relaxed);
            return;
        }
        rows.fetch_add(1, Ordering::Relaxed);
    }
    if out.flush().is_err() {
        failed.store(true, Ordering::Relaxed);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn utc_stamps_match_known_dates() {
        // Known instants (POSIX time, common practice to check against `date -u -d @N`).
        assert_eq!(utc_stamp(0), "1970-01-01_00-00-00");
        assert_eq!(utc_stamp(951_782_400), "2000-02-29_00-00-00");
        assert_eq!(utc_stamp(1_796_255_999), "2026-12-02_23-59-59");
    }

    #[test]
    fn rows_reach_the_file_and_dropping_the_log_flushes_it() {
        let dir = std::env::temp_dir().join(format!("weft-setlog-test-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        let families = vec!["kick".to_owned(), "driven guitar".to_owned()];
        let log = SetLog::start(&dir, &families).expect("log starts");
        let path = log.path().to_owned();
        for i in 0..10 {
            let mut shares = [0.0; MAX_FAMILIES];
            shares[0] = 0.25;
            shares[1] = 0.5;
            assert!(log.push(LogRow {
                time_s: f64::from(i) * 0.5,
                unix_s: 1.0e9,
                rms_dbfs: -20.0,
                centroid_hz: 1000.0,
                rolloff_hz: 4000.0,
                flatness: 0.1,
                flux_db: 1.0,
                shares,
                unexplained: 0.25,
                closeness: if i < 5 { f32::NAN } else { 0.75 },
            }));
        }
        drop(log); // as when the plugin is closed mid-set
        let text = std::fs::read_to_string(&path).expect("log written");
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(
            lines[0],
            "time_s,unix_s,rms_dbfs,centroid_hz,rolloff_hz,flatness,flux_db,share_kick,\
             share_driven_guitar,unexplained,closeness"
        );
        assert_eq!(lines.len(), 11);
        assert!(lines[1].ends_with(",0.2500,0.5000,0.2500,"), "{}", lines[1]);
        assert!(lines[10].ends_with(",0.7500"), "{}", lines[10]);
        let _ = std::fs::remove_dir_all(&dir);
    }
}
