//! Writing rows: JSON lines or CSV with a header row, to standard output or to a file that only
//! appears under its final name once it is complete.
//!
//! Rows are any `Serialize` value. JSON lines keep the row's nesting (`{"t": …, "level": {…}}`);
//! CSV flattens it: a column is named by the field's path without its top-level group, joined
//! with `_` (`level.rms_dbfs` → `rms_dbfs`, `descriptors.centroid_hz.mean` → `centroid_hz_mean`),
//! arrays count from 1 (`mfcc_1 … mfcc_20`), and every name carries its unit. Family shares are
//! the one group that keeps a prefix: `shares.{family}` becomes `share_<slug>`
//! (`shares.driven guitar` → `share_driven_guitar`, with `weft_engine::windows::slug`; keys that
//! already read `share_…` are kept).

use anyhow::{Context, Result, bail};
use serde::Serialize;
use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};

/// How rows are written.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum RowFormat {
    /// Comma-separated values with a header row of column names with units.
    Csv,
    /// One JSON object per line.
    Jsonl,
}

impl RowFormat {
    /// The file name extension.
    pub fn extension(self) -> &'static str {
        match self {
            Self::Csv => "csv",
            Self::Jsonl => "jsonl",
        }
    }
}

/// Column names that need a unit the JSON key leaves implicit.
const CSV_RENAMES: &[(&str, &str)] = &[("t", "t_s")];

/// Writes rows of one shape to a stream.
pub struct RowWriter<W: Write> {
    out: W,
    format: RowFormat,
    header: Option<Vec<String>>,
}

impl<W: Write> RowWriter<W> {
    /// A writer in `format`; the CSV header is written with the first row.
    pub fn new(out: W, format: RowFormat) -> Self {
        Self {
            out,
            format,
            header: None,
        }
    }

    /// Writes one row.
    pub fn write<T: Serialize>(&mut self, row: &T) -> Result<()> {
        let text = serde_json::to_string(row).context("a row could not be serialised")?;
        match self.format {
            RowFormat::Jsonl => {
                self.out.write_all(text.as_bytes())?;
                self.out.write_all(b"\n")?;
            }
            RowFormat::Csv => {
                let cells = flatten(&text)?;
                match &self.header {
                    None => {
                        let names: Vec<&str> = cells
                            .iter()
                            .map(|(name, _)| {
                                CSV_RENAMES
                                    .iter()
                                    .find(|(from, _)| from == name)
                                    .map_or(name.as_str(), |(_, to)| to)
                            })
                            .collect();
                        writeln!(self.out, "{}", names.join(","))?;
                        self.header = Some(cells.iter().map(|(n, _)| n.clone()).collect());
                    }
                    Some(header) => {
                        if header.len() != cells.len()
                            || header.iter().zip(&cells).any(|(h, (n, _))| h != n)
                        {
                            bail!("rows of different shapes cannot share a CSV file");
                        }
                    }
                }
                let line: Vec<&str> = cells.iter().map(|(_, v)| v.as_str()).collect();
                writeln!(self.out, "{}", line.join(","))?;
            }
        }
        Ok(())
    }

    /// Flushes and returns the stream.
    pub fn into_inner(mut self) -> Result<W> {
        self.out.flush()?;
        Ok(self.out)
    }
}

/// Flattens serde_json's text of one row into `(column, cell)` pairs in field order, keeping
/// each number exactly as serde_json wrote it (shortest round-trip form for `f32` and `f64`).
fn flatten(text: &str) -> Result<Vec<(String, String)>> {
    let mut out = Vec::new();
    let mut parser = Flattener {
        bytes: text.as_bytes(),
        text,
        pos: 0,
    };
    parser.value(&mut Vec::new(), &mut out)?;
    Ok(out)
}

/// A small reader for the JSON serde_json writes: objects, arrays, strings and literals.
struct Flattener<'a> {
    bytes: &'a [u8],
    text: &'a str,
    pos: usize,
}

impl Flattener<'_> {
    fn skip_ws(&mut self) {
        while self.pos < self.bytes.len() && self.bytes[self.pos].is_ascii_whitespace() {
            self.pos += 1;
        }
    }

    fn peek(&mut self) -> Result<u8> {
        self.skip_ws();
        match self.bytes.get(self.pos) {
            Some(&b) => Ok(b),
            None => bail!("unexpected end of a row's JSON"),
        }
    }

    fn string(&mut self) -> Result<String> {
        let start = self.pos;
        self.pos += 1;
        while self.pos < self.bytes.len() {
            match self.bytes[self.pos] {
                b'\\' => self.pos += 2,
                b'"' => {
                    self.pos += 1;
                    return Ok(serde_json::from_str(&self.text[start..self.pos])?);
                }
                _ => self.pos += 1,
            }
        }
        bail!("unterminated string in a row's JSON")
    }

    fn value(&mut self, path: &mut Vec<String>, out: &mut Vec<(String, String)>) -> Result<()> {
        let name = match path.len() {
            0 => "value".to_owned(),
            1 => path[0].clone(),
            _ if path[0] == "shares" => {
                let key = path[1..].join("_");
                if key.starts_with("share_") {
                    key
                } else {
                    format!("share_{}", weft_engine::windows::slug(&key))
                }
            }
            _ => path[1..].join("_"),
        };
        match self.peek()? {
            b'{' => {
                self.pos += 1;
                if self.peek()? == b'}' {
                    self.pos += 1;
                    return Ok(());
                }
                loop {
                    if self.peek()? != b'"' {
                        bail!("expected a key in a row's JSON");
                    }
                    let key = self.string()?;
                    if self.peek()? != b':' {
                        bail!("expected ':' in a row's JSON");
                    }
                    self.pos += 1;
                    path.push(key);
                    self.value(path, out)?;
                    path.pop();
                    match self.peek()? {
                        b',' => self.pos += 1,
                        b'}' => {
                            self.pos += 1;
                            return Ok(());
                        }
                        _ => bail!("expected ',' or '}}' in a row's JSON"),
                    }
                }
            }
            b'[' => {
                self.pos += 1;
                if self.peek()? == b']' {
                    self.pos += 1;
                    return Ok(());
                }
                let mut i = 1;
                loop {
                    if path.is_empty() {
                        path.push("value".to_owned());
                    }
                    path.push(i.to_string());
                    self.value(path, out)?;
                    path.pop();
                    i += 1;
                    match self.peek()? {
                        b',' => self.pos += 1,
                        b']' => {
                            self.pos += 1;
                            return Ok(());
                        }
                        _ => bail!("expected ',' or ']' in a row's JSON"),
                    }
                }
            }
            b'"' => {
                let s = self.string()?;
                out.push((name, csv_quote(&s)));
                Ok(())
            }
            _ => {
                let start = self.pos;
                while self.pos < self.bytes.len()
                    && !matches!(self.bytes[self.pos], b',' | b'}' | b']')
                    && !self.bytes[self.pos].is_ascii_whitespace()
                {
                    self.pos += 1;
                }
                let literal = &self.text[start..self.pos];
                let cell = if literal == "null" { "" } else { literal };
                out.push((name, cell.to_owned()));
                Ok(())
            }
        }
    }
}

fn csv_quote(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_owned()
    }
}

/// A file written under a temporary name in its final folder and renamed into place by
/// [`AtomicFile::commit`]; dropped without committing, it is removed. So a failed or interrupted
/// run never leaves a partial file under a name that looks complete.
pub struct AtomicFile {
    temp: PathBuf,
    dest: PathBuf,
    out: Option<BufWriter<File>>,
}

impl AtomicFile {
    /// Creates the temporary file next to `dest`.
    pub fn create(dest: &Path) -> Result<Self> {
        let temp = temp_path(dest);
        let file =
            File::create(&temp).with_context(|| format!("cannot create {}", temp.display()))?;
        Ok(Self {
            temp,
            dest: dest.to_owned(),
            out: Some(BufWriter::new(file)),
        })
    }

    /// The temporary path (for writers that open the file themselves).
    pub fn temp_path(&self) -> &Path {
        &self.temp
    }

    /// Flushes, syncs and renames the file to its final name.
    pub fn commit(mut self) -> Result<()> {
        if let Some(out) = self.out.take() {
            let file = out
                .into_inner()
                .map_err(|e| e.into_error())
                .with_context(|| format!("cannot write {}", self.temp.display()))?;
            file.sync_all()?;
        }
        std::fs::rename(&self.temp, &self.dest).with_context(|| {
            format!(
                "cannot rename {} to {}",
                self.temp.display(),
                self.dest.display()
            )
        })?;
        // Renamed: nothing left for Drop to remove.
        self.temp = PathBuf::new();
        Ok(())
    }
}

impl Write for AtomicFile {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        match &mut self.out {
            Some(out) => out.write(buf),
            None => Err(std::io::Error::other("file already committed")),
        }
    }

    fn flush(&mut self) -> std::io::Result<()> {
        match &mut self.out {
            Some(out) => out.flush(),
            None => Ok(()),
        }
    }
}

impl Drop for AtomicFile {
    fn drop(&mut self) {
        self.out = None;
        if !self.temp.as_os_str().is_empty() {
            let _ = std::fs::remove_file(&self.temp);
        }
    }
}

/// `dir/.name.partial-PID.ext`: hidden, unmistakably partial, and with the final extension kept
/// (plot backends choose their encoder by extension).
pub fn temp_path(dest: &Path) -> PathBuf {
    let name = dest
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let (stem, ext) = match name.rsplit_once('.') {
        Some((stem, ext)) => (stem.to_owned(), format!(".{ext}")),
        None => (name.clone(), String::new()),
    };
    dest.with_file_name(format!(".{stem}.partial-{}{ext}", std::process::id()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Serialize)]
    struct Stat {
        mean: f32,
    }

    #[derive(Serialize)]
    struct Inner {
        rms_dbfs: f32,
        mfcc: [f32; 2],
        stat: Stat,
    }

    #[derive(Serialize)]
    struct Row {
        t: f64,
        name: &'static str,
        inner: Inner,
    }

    #[test]
    fn csv_flattens_groups_and_arrays_with_one_header() {
        let mut w = RowWriter::new(Vec::new(), RowFormat::Csv);
        for t in [0.0, 0.5] {
            w.write(&Row {
                t,
                name: "a,b",
                inner: Inner {
                    rms_dbfs: -6.5,
                    mfcc: [1.0, -2.0],
                    stat: Stat { mean: 4.0 },
                },
            })
            .expect("write");
        }
        let text = String::from_utf8(w.into_inner().expect("flush")).expect("utf8");
        assert_eq!(
            text,
            "t_s,name,rms_dbfs,mfcc_1,mfcc_2,stat_mean\n0.0,\"a,b\",-6.5,1.0,-2.0,4.0\n0.5,\"a,b\",-6.5,1.0,-2.0,4.0\n"
        );
    }

    #[test]
    fn share_columns_keep_their_prefix() {
        let mut w = RowWriter::new(Vec::new(), RowFormat::Csv);
        let row = serde_json::json!({
            "t": 0.5,
            "shares": {"driven guitar": 0.25, "share_bass": 0.5},
            "unexplained": 0.25
        });
        w.write(&row).expect("write");
        let text = String::from_utf8(w.into_inner().expect("flush")).expect("utf8");
        assert_eq!(
            text,
            // serde_json's map orders keys alphabetically.
            "share_driven_guitar,share_bass,t_s,unexplained\n0.25,0.5,0.5,0.25\n"
        );
    }

    #[test]
    fn jsonl_keeps_nesting() {
        let mut w = RowWriter::new(Vec::new(), RowFormat::Jsonl);
        w.write(&Row {
            t: 1.0,
            name: "x",
            inner: Inner {
                rms_dbfs: -1.0,
                mfcc: [0.0, 3.0],
                stat: Stat { mean: 0.0 },
            },
        })
        .expect("write");
        let text = String::from_utf8(w.into_inner().expect("flush")).expect("utf8");
        let v: serde_json::Value = serde_json::from_str(text.trim()).expect("json");
        assert_eq!(v["inner"]["mfcc"][1], 3.0);
        assert!(text.ends_with('\n') && text.lines().count() == 1);
    }

    #[test]
    fn atomic_file_appears_only_on_commit() {
        let dir = tempfile::tempdir().expect("tempdir");
        let dest = dir.path().join("out.csv");
        {
            let mut f = AtomicFile::create(&dest).expect("create");
            f.write_all(b"partial").expect("write");
            assert!(f.temp_path().exists());
            // Dropped without commit.
        }
        assert!(!dest.exists());
        assert_eq!(std::fs::read_dir(dir.path()).expect("dir").count(), 0);
        let mut f = AtomicFile::create(&dest).expect("create");
        f.write_all(b"done").expect("write");
        f.commit().expect("commit");
        assert_eq!(std::fs::read(&dest).expect("read"), b"done");
        assert_eq!(std::fs::read_dir(dir.path()).expect("dir").count(), 1);
    }
}
