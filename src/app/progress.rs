//! The `replay` progress bar (indicatif): lines, bytes, accepted events per second and, when
//! the input's size is known, an ETA. Drawn only when stderr is a terminal; off a terminal
//! nothing is created, so logs and scripts see no control characters.
//!
//! Cost: the reader adds one relaxed atomic add per `read` call (about one per MiB), and the
//! per-line hook is a counter increment; the clock is read once every [`CHECK_EVERY`] lines
//! and the bar is redrawn at most every [`REDRAW`], so a replay is not measurably slower.

use std::io::{IsTerminal, Read};
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant};

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

/// Lines between two looks at the clock.
pub const CHECK_EVERY: u64 = 4096;
/// Shortest time between two redraws.
pub const REDRAW: Duration = Duration::from_millis(100);

/// A progress bar over one replay's input.
#[derive(Debug)]
pub struct ReplayProgress {
    bar: ProgressBar,
    /// Bytes read from the input so far (shared with [`CountingReader`]).
    bytes: Arc<AtomicU64>,
    started: Instant,
    last_draw: Instant,
    n_lines: u64,
}

impl ReplayProgress {
    /// A bar on stderr when stderr is a terminal; `None` otherwise (nothing is drawn).
    /// `total_bytes`: the input's size when it is a regular file (enables the ETA).
    pub fn on_terminal(total_bytes: Option<u64>) -> Option<ReplayProgress> {
        std::io::stderr()
            .is_terminal()
            .then(|| ReplayProgress::with_target(total_bytes, ProgressDrawTarget::stderr()))
    }

    /// A bar drawn to `target` (tests draw into memory).
    pub fn with_target(total_bytes: Option<u64>, target: ProgressDrawTarget) -> ReplayProgress {
        // The templates are constants; a bad one would be a bug caught by the tests below,
        // so fall back to the default style rather than fail a replay over a progress bar.
        let style = match total_bytes {
            // Short enough for an 80-column terminal with a bar of a dozen cells.
            Some(_) => ProgressStyle::with_template(
                "{spinner} {elapsed} [{wide_bar}] {binary_bytes}/{binary_total_bytes} {msg} ETA {eta}",
            ),
            None => ProgressStyle::with_template("{spinner} {elapsed} {binary_bytes} {msg}"),
        }
        .unwrap_or_else(|_| ProgressStyle::default_bar());
        let bar = ProgressBar::with_draw_target(total_bytes, target).with_style(style);
        let now = Instant::now();
        ReplayProgress {
            bar,
            bytes: Arc::new(AtomicU64::new(0)),
            started: now,
            last_draw: now,
            n_lines: 0,
        }
    }

    /// Wraps the input so that the bar sees the bytes read.
    pub fn reader<R: Read>(&self, inner: R) -> CountingReader<R> {
        CountingReader {
            inner,
            bytes: Some(self.bytes.clone()),
        }
    }

    /// Counts one line; true when it is time to [`ReplayProgress::draw`].
    #[inline]
    pub fn line_done(&mut self) -> bool {
        self.n_lines += 1;
        self.n_lines.is_multiple_of(CHECK_EVERY) && self.last_draw.elapsed() >= REDRAW
    }

    /// Updates the bar with the bytes read and `n_accepted` events so far.
    pub fn draw(&mut self, n_accepted: u64) {
        self.last_draw = Instant::now();
        let secs = self.started.elapsed().as_secs_f64().max(1e-9);
        self.bar.set_position(self.bytes.load(Ordering::Relaxed));
        self.bar.set_message(format!(
            "{} lines {:.0} events/s",
            self.n_lines,
            n_accepted as f64 / secs
        ));
    }

    /// Removes the bar (the replay's summary line follows).
    pub fn finish(&self) {
        self.bar.finish_and_clear();
    }
}

/// A reader that adds the bytes it reads to a shared counter (none: a plain pass-through).
#[derive(Debug)]
pub struct CountingReader<R> {
    inner: R,
    bytes: Option<Arc<AtomicU64>>,
}

impl<R> CountingReader<R> {
    /// A pass-through reader that counts nothing.
    pub fn plain(inner: R) -> CountingReader<R> {
        CountingReader { inner, bytes: None }
    }
}

impl<R: Read> Read for CountingReader<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        if let Some(b) = &self.bytes {
            b.fetch_add(n as u64, Ordering::Relaxed);
        }
        Ok(n)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::Mutex;

    /// A terminal that records what is written to it.
    #[derive(Debug, Clone, Default)]
    struct Capture(Arc<Mutex<String>>);

    impl indicatif::TermLike for Capture {
        fn width(&self) -> u16 {
            160
        }
        fn move_cursor_up(&self, _: usize) -> std::io::Result<()> {
            Ok(())
        }
        fn move_cursor_down(&self, _: usize) -> std::io::Result<()> {
            Ok(())
        }
        fn move_cursor_right(&self, _: usize) -> std::io::Result<()> {
            Ok(())
        }
        fn move_cursor_left(&self, _: usize) -> std::io::Result<()> {
            Ok(())
        }
        fn write_line(&self, s: &str) -> std::io::Result<()> {
            self.write_str(&format!("{s}\n"))
        }
        fn write_str(&self, s: &str) -> std::io::Result<()> {
            self.0.lock().unwrap().push_str(s);
            Ok(())
        }
        fn clear_line(&self) -> std::io::Result<()> {
            Ok(())
        }
        fn flush(&self) -> std::io::Result<()> {
            Ok(())
        }
    }

    fn run(total: Option<u64>) -> String {
        let term = Capture::default();
        let mut p = ReplayProgress::with_target(
            total,
            ProgressDrawTarget::term_like_with_hz(Box::new(term.clone()), 100),
        );
        let input = vec![b'x'; 2048];
        let mut r = p.reader(&input[..]);
        std::io::copy(&mut r, &mut std::io::sink()).unwrap();
        for _ in 0..3 {
            p.line_done();
        }
        p.draw(2);
        let out = term.0.lock().unwrap().clone();
        p.finish();
        out
    }

    #[test]
    fn the_bar_shows_lines_bytes_rate_and_an_eta_only_for_a_known_size() {
        let known = run(Some(4096));
        assert!(known.contains("3 lines "), "{known}");
        assert!(known.contains("events/s"), "{known}");
        assert!(known.contains("2.00 KiB/4.00 KiB"), "{known}");
        assert!(known.contains("ETA"), "{known}");
        let stream = run(None);
        assert!(stream.contains("3 lines "), "{stream}");
        assert!(stream.contains("events/s"), "{stream}");
        assert!(stream.contains("2.00 KiB"), "{stream}");
        assert!(!stream.contains("ETA"), "{stream}");
    }

    #[test]
    fn the_clock_is_read_only_every_check_every_lines() {
        let mut p = ReplayProgress::with_target(None, ProgressDrawTarget::hidden());
        p.last_draw = Instant::now() - 2 * REDRAW;
        let due: Vec<u64> = (1..=3 * CHECK_EVERY).filter(|_| p.line_done()).collect();
        assert_eq!(due.len(), 3, "due exactly at multiples of CHECK_EVERY");
    }

    #[test]
    fn counting_reader_counts_and_plain_passes_through() {
        let p = ReplayProgress::with_target(None, ProgressDrawTarget::hidden());
        let mut out = Vec::new();
        p.reader(&b"abc\ndef\n"[..]).read_to_end(&mut out).unwrap();
        assert_eq!(p.bytes.load(Ordering::Relaxed), 8);
        let mut plain = Vec::new();
        CountingReader::plain(&b"xyz"[..])
            .read_to_end(&mut plain)
            .unwrap();
        assert_eq!(plain, b"xyz");
    }
}
