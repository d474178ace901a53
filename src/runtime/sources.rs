//! Ingest workers: standard input, a followed file, and a TCP line listener. Each reads
//! lines and sends them in batches into one bounded channel; when the engine falls behind
//! the channel fills, `send` waits, and the worker stops reading (backpressure). Nothing
//! is buffered without bound and nothing is dropped silently: an over-long line becomes a
//! counted `line_too_long` rejection.

use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use tokio::io::{AsyncBufReadExt, AsyncRead, AsyncSeekExt, BufReader};
use tokio::sync::{mpsc, watch};

use crate::engine::event::RejectReason;
use crate::runtime::metrics::Metrics;

/// Lines per batch: amortises channel and wake-up costs.
pub const BATCH_LINES: usize = 512;

/// A batch of raw lines (without newlines) and I/O-level rejections.
#[derive(Debug, Default)]
pub struct Batch {
    /// Lines to parse.
    pub lines: Vec<Vec<u8>>,
    /// Lines rejected before parsing (too long).
    pub rejects: Vec<RejectReason>,
    /// Bytes read.
    pub bytes: u64,
    /// For file sources: (source index, byte offset after this batch).
    pub offset: Option<(usize, u64)>,
}

impl Batch {
    fn is_empty(&self) -> bool {
        self.lines.is_empty() && self.rejects.is_empty()
    }
}

/// Splits a byte stream into lines of at most `max` bytes, reporting longer ones.
#[derive(Debug)]
pub struct LineSplitter {
    max: usize,
    cur: Vec<u8>,
    too_long: bool,
}

impl LineSplitter {
    /// A splitter for lines of at most `max` bytes.
    pub fn new(max: usize) -> LineSplitter {
        LineSplitter {
            max,
            cur: Vec::new(),
            too_long: false,
        }
    }

    /// Feeds bytes; complete lines go to `batch`.
    pub fn feed(&mut self, mut data: &[u8], batch: &mut Batch) {
        while !data.is_empty() {
            match data.iter().position(|&b| b == b'\n') {
                Some(i) => {
                    self.push(&data[..i]);
                    self.end_line(batch);
                    data = &data[i + 1..];
                }
                None => {
                    self.push(data);
                    data = &[];
                }
            }
        }
    }

    fn push(&mut self, part: &[u8]) {
        if self.too_long {
            return;
        }
        if self.cur.len() + part.len() > self.max {
            self.too_long = true;
            self.cur = Vec::new();
        } else {
            self.cur.extend_from_slice(part);
        }
    }

    fn end_line(&mut self, batch: &mut Batch) {
        if self.too_long {
            batch.rejects.push(RejectReason::LineTooLong);
        } else {
            let mut line = std::mem::take(&mut self.cur);
            if line.last() == Some(&b'\r') {
                line.pop();
            }
            batch.lines.push(line);
        }
        self.too_long = false;
    }

    /// End of stream: a final line without newline still counts.
    pub fn finish(&mut self, batch: &mut Batch) {
        if self.too_long || !self.cur.is_empty() {
            self.end_line(batch);
        }
    }

    /// Bytes of an unfinished line held back.
    pub fn pending(&self) -> usize {
        self.cur.len()
    }
}

/// Reads a stream to its end (or until shutdown), sending batches.
async fn pump_stream<R: AsyncRead + Unpin>(
    reader: R,
    max_line: usize,
    idle: Option<Duration>,
    tx: &mpsc::Sender<Batch>,
    mut shutdown: watch::Receiver<bool>,
    metrics: &Arc<std::sync::Mutex<Metrics>>,
) {
    let mut reader = BufReader::with_capacity(64 * 1024, reader);
    let mut split = LineSplitter::new(max_line);
    let mut batch = Batch::default();
    loop {
        let read = async {
            let buf = reader.fill_buf().await?;
            let data = buf.to_vec();
            let n = data.len();
            reader.consume(n);
            Ok::<Vec<u8>, std::io::Error>(data)
        };
        let data = tokio::select! {
            biased;
            _ = shutdown.changed() => break,
            r = async {
                match idle {
                    Some(d) => tokio::time::timeout(d, read).await.unwrap_or_else(|_| Err(std::io::Error::new(std::io::ErrorKind::TimedOut, "idle"))),
                    None => read.await,
                }
            } => r,
        };
        match data {
            Ok(d) if d.is_empty() => break,
            Ok(d) => {
                batch.bytes += d.len() as u64;
                split.feed(&d, &mut batch);
                if batch.lines.len() >= BATCH_LINES || !batch.rejects.is_empty() {
                    if let Ok(m) = metrics.lock() {
                        m.input_bytes.inc_by(batch.bytes);
                    }
                    if tx.send(std::mem::take(&mut batch)).await.is_err() {
                        return;
                    }
                }
                // Flush partial batches when no more input is immediately buffered.
                if reader.buffer().is_empty() && !batch.is_empty() {
                    if let Ok(m) = metrics.lock() {
                        m.input_bytes.inc_by(batch.bytes);
                    }
                    if tx.send(std::mem::take(&mut batch)).await.is_err() {
                        return;
                    }
                }
            }
            Err(e) => {
                tracing::info!(error = %e, "input stream ended");
                break;
            }
        }
    }
    split.finish(&mut batch);
    if !batch.is_empty() {
        let _ = tx.send(batch).await;
    }
}

/// Standard input until end of file.
pub async fn stdin_source(
    max_line: usize,
    tx: mpsc::Sender<Batch>,
    shutdown: watch::Receiver<bool>,
    metrics: Arc<std::sync::Mutex<Metrics>>,
) {
    pump_stream(tokio::io::stdin(), max_line, None, &tx, shutdown, &metrics).await;
    tracing::info!("stdin source reached end of input");
}

/// A TCP listener; every connection is a line stream.
pub async fn tcp_source(
    listener: tokio::net::TcpListener,
    max_line: usize,
    max_connections: usize,
    idle_timeout: Duration,
    tx: mpsc::Sender<Batch>,
    mut shutdown: watch::Receiver<bool>,
    metrics: Arc<std::sync::Mutex<Metrics>>,
) {
    let permits = Arc::new(tokio::sync::Semaphore::new(max_connections));
    loop {
        let accepted = tokio::select! {
            biased;
            _ = shutdown.changed() => break,
            a = listener.accept() => a,
        };
        let (stream, _peer) = match accepted {
            Ok(x) => x,
            Err(e) => {
                tracing::warn!(error = %e, "accept failed");
                tokio::time::sleep(Duration::from_millis(50)).await;
                continue;
            }
        };
        let Ok(permit) = permits.clone().try_acquire_owned() else {
            tracing::warn!(
                max_connections,
                "connection refused: too many open ingest connections"
            );
            drop(stream);
            continue;
        };
        let (tx, sd, m) = (tx.clone(), shutdown.clone(), metrics.clone());
        tokio::spawn(async move {
            if let Ok(g) = m.lock() {
                g.tcp_connections.inc();
            }
            pump_stream(stream, max_line, Some(idle_timeout), &tx, sd, &m).await;
            if let Ok(g) = m.lock() {
                g.tcp_connections.dec();
            }
            drop(permit);
        });
    }
}

/// Follows a file like `tail -F`: reads appended lines from `offset`, survives rotation by
/// rename (finishes the old file, then opens the new one) and by truncation (starts over).
#[allow(clippy::too_many_arguments)]
pub async fn file_source(
    index: usize,
    path: PathBuf,
    mut offset: u64,
    max_line: usize,
    tx: mpsc::Sender<Batch>,
    mut shutdown: watch::Receiver<bool>,
    metrics: Arc<std::sync::Mutex<Metrics>>,
    poll: Duration,
) {
    use std::os::unix::fs::MetadataExt;
    let mut split = LineSplitter::new(max_line);
    let mut file: Option<(tokio::fs::File, u64)> = None;
    let mut buf = vec![0u8; 64 * 1024];
    loop {
        if *shutdown.borrow() {
            break;
        }
        if file.is_none() {
            match tokio::fs::File::open(&path).await {
                Ok(mut f) => {
                    let ino = f.metadata().await.map(|m| m.ino()).unwrap_or(0);
                    let len = f.metadata().await.map(|m| m.len()).unwrap_or(0);
                    if offset > len {
                        offset = 0; // truncated while we were away
                    }
                    if f.seek(std::io::SeekFrom::Start(offset)).await.is_ok() {
                        file = Some((f, ino));
                    }
                }
                Err(_) => {
                    tokio::select! { _ = shutdown.changed() => break, _ = tokio::time::sleep(poll) => {} }
                    continue;
                }
            }
        }
        let Some((f, ino)) = file.as_mut() else {
            continue;
        };
        let n = {
            use tokio::io::AsyncReadExt;
            tokio::select! {
                biased;
                _ = shutdown.changed() => break,
                r = f.read(&mut buf) => r.unwrap_or(0),
            }
        };
        if n > 0 {
            let mut batch = Batch {
                bytes: n as u64,
                ..Batch::default()
            };
            split.feed(&buf[..n], &mut batch);
            offset += n as u64;
            // The offset saved with a batch points after its last complete line.
            batch.offset = Some((index, offset - split.pending() as u64));
            if let Ok(m) = metrics.lock() {
                m.input_bytes.inc_by(n as u64);
            }
            if tx.send(batch).await.is_err() {
                return;
            }
            continue;
        }
        // At the end of the file: rotated or truncated?
        match tokio::fs::metadata(&path).await {
            Ok(meta) if meta.ino() != *ino => {
                tracing::info!(path = %path.display(), "input file rotated; following the new file");
                file = None;
                offset = 0;
                split = LineSplitter::new(max_line);
                continue;
            }
            Ok(meta) if meta.len() < offset => {
                tracing::info!(path = %path.display(), "input file truncated; reading from the start");
                file = None;
                offset = 0;
                split = LineSplitter::new(max_line);
                continue;
            }
            _ => {}
        }
        tokio::select! { _ = shutdown.changed() => break, _ = tokio::time::sleep(poll) => {} }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splitter_handles_chunks_crlf_and_long_lines() {
        let mut s = LineSplitter::new(8);
        let mut b = Batch::default();
        s.feed(b"ab", &mut b);
        s.feed(b"c\r\nxyz\n0123456789abc\nok", &mut b);
        s.finish(&mut b);
        assert_eq!(
            b.lines,
            vec![b"abc".to_vec(), b"xyz".to_vec(), b"ok".to_vec()]
        );
        assert_eq!(b.rejects, vec![RejectReason::LineTooLong]);
    }
}
