//! Release sinks: where records go once the engine has produced them. The file sink
//! appends one JSON object per line to `releases.jsonl`.

use std::fs::{File, OpenOptions};
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};

use crate::engine::release::Release;

/// Anything that takes releases in seq order.
pub trait ReleaseSink {
    /// Takes one record.
    fn publish(&mut self, release: &Release) -> std::io::Result<()>;
    /// Makes everything taken so far durable.
    fn flush(&mut self) -> std::io::Result<()>;
}

/// Appends records to `DIR/releases.jsonl`.
pub struct JsonlSink {
    path: PathBuf,
    out: BufWriter<File>,
}

impl JsonlSink {
    /// Opens (creating) `dir/releases.jsonl` for appending; creates `dir`.
    pub fn open(dir: &Path) -> std::io::Result<JsonlSink> {
        std::fs::create_dir_all(dir)?;
        let path = dir.join("releases.jsonl");
        let file = OpenOptions::new().create(true).append(true).open(&path)?;
        Ok(JsonlSink {
            path,
            out: BufWriter::new(file),
        })
    }

    /// Creates `dir/releases.jsonl` anew, truncating an old one.
    pub fn create(dir: &Path) -> std::io::Result<JsonlSink> {
        std::fs::create_dir_all(dir)?;
        let path = dir.join("releases.jsonl");
        let file = File::create(&path)?;
        Ok(JsonlSink {
            path,
            out: BufWriter::new(file),
        })
    }

    /// The file written.
    pub fn path(&self) -> &Path {
        &self.path
    }
}

impl ReleaseSink for JsonlSink {
    fn publish(&mut self, release: &Release) -> std::io::Result<()> {
        serde_json::to_writer(&mut self.out, release)?;
        self.out.write_all(b"\n")
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.out.flush()?;
        self.out.get_ref().sync_data()
    }
}

/// Keeps records in memory (tests, the demo summary).
#[derive(Default)]
pub struct MemorySink {
    /// Everything published.
    pub releases: Vec<Release>,
}

impl ReleaseSink for MemorySink {
    fn publish(&mut self, release: &Release) -> std::io::Result<()> {
        self.releases.push(release.clone());
        Ok(())
    }

    fn flush(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}
