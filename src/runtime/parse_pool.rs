//! Parallel line parsing for `scrim replay`: lines are decoded on several threads and their
//! verdicts handed to the (single-threaded) engine in input order, so the engine's output
//! cannot depend on the number of threads.
//!
//! # Why this is deterministic
//! Preparing a line ([`LineDecoder::prepare`]: parsing and the keyed unit hash) is a pure
//! function of the line's bytes and the engine's key: it reads
//! no state the engine changes. The input is cut into chunks of
//! whole lines, numbered in reading order; each chunk's verdicts come back in line order
//! and the caller consumes chunk `k` only after chunk `k - 1`. The engine therefore sees
//! exactly the sequence `handle_prepared(prepare(line))` that `handle_line(line)` gives,
//! for any thread count and any scheduling.
//!
//! # Why the calling thread parses too
//! With two cores, one dedicated parser thread plus the engine thread can go no faster than
//! the parse alone (the floor). To beat it, the calling thread, whenever the next chunk in
//! order is not ready, reads and parses a chunk itself, so both cores share the parse and
//! the engine work between them.
//!
//! # Who reads
//! Any thread that needs work reads the next chunk (one at a time, under a lock that also
//! numbers the chunks) and parses it; a worker with nothing to do reads ahead, up to the
//! in-flight limit. The calling thread, which runs the engine and is the busier one, so
//! reads only when no parsed chunk is waiting for it (issue 9: reading was a tenth of its
//! time when it read every chunk).
//!
//! # Helping the engine
//! A worker also helps with the window close the engine posts on [`Assists`] (summing a
//! closed window's survivors, in blocks), before its next chunk or when woken while it
//! waits for room to read ahead. The sum is integer addition, so who takes which block
//! changes nothing (see `SharedSum`).
//!
//! # Memory
//! At most [`CHUNKS_IN_FLIGHT_PER_THREAD`] × `threads` chunks of [`CHUNK_BYTES`] are in
//! flight (read but not yet consumed), so memory does not grow with the input (about 2 MiB
//! per thread with their verdicts); buffers are recycled. A single line
//! longer than a chunk grows its chunk until its newline, as `BufRead::read_until` would.

use std::collections::BTreeMap;
use std::io::{self, Read};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Condvar, Mutex, MutexGuard, PoisonError};

use crate::engine::contribution::{HelpBoard, SharedSum};
use crate::engine::core::{LineDecoder, Prepared};
use crate::engine::event::{LineShape, RawLine};

/// Target size of one chunk of input: about 450 demo lines, a millisecond of parsing. The
/// few lock operations per chunk cost nothing next to that, and a chunk held by a thread
/// the OS has descheduled is small enough that the others are not starved for long.
pub const CHUNK_BYTES: usize = 64 * 1024;

/// Read-ahead per thread, in chunks. The window lets the calling thread parse far ahead
/// when a worker holding the next chunk is descheduled (on a loaded machine), instead of
/// waiting for it; 16 chunks are about 1 MiB of input.
pub const CHUNKS_IN_FLIGHT_PER_THREAD: u64 = 16;

/// Longest a waiting worker can miss a window close's call for help (see [`Assists`]).
const ASSIST_POLL: std::time::Duration = std::time::Duration::from_millis(1);

/// Where the engine posts a closing window's survivors ([`SharedSum`]) for the parse
/// workers to help with between chunks (issue 9: the engine thread is the busy one, and
/// scoped helper threads had to share the worker's core). Give it to the engine with
/// `Engine::set_help_board` and to [`decode_in_order`].
#[derive(Debug, Default)]
pub struct Assists {
    posted: Mutex<Option<Arc<SharedSum>>>,
    /// Whether something is posted (read without the lock between chunks).
    any: AtomicBool,
    room: Condvar,
}

impl Assists {
    /// Whether a close is waiting for help.
    fn wanted(&self) -> bool {
        self.any.load(Ordering::Acquire)
    }

    /// Helps with the posted close, if any.
    fn help(&self) {
        if !self.wanted() {
            return;
        }
        let posted = self
            .posted
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .clone();
        if let Some(sum) = posted {
            sum.help();
        }
    }
}

impl HelpBoard for Assists {
    fn post(&self, sum: Arc<SharedSum>) {
        *self.posted.lock().unwrap_or_else(PoisonError::into_inner) = Some(sum);
        self.any.store(true, Ordering::Release);
        self.room.notify_all();
    }

    fn withdraw(&self) {
        self.any.store(false, Ordering::Release);
        self.posted
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .take();
    }
}

/// A line ready for the engine: the parser's verdict, unit id hashed.
type Verdict = Prepared;

/// Whole lines read from the input, with the position of the chunk in reading order.
struct Job {
    seq: u64,
    /// The chunk is `bytes[..len]` (see [`ChunkReader`]).
    bytes: Vec<u8>,
    len: usize,
    /// An empty vector to fill (recycled from an earlier chunk).
    verdicts: Vec<Verdict>,
}

/// The input and the number of the next chunk read from it: whoever holds the lock reads
/// one chunk and takes its number, so chunks are numbered in reading order.
struct Input<R> {
    reader: ChunkReader<R>,
    next_seq: u64,
}

/// What the threads share under one lock.
struct Queue {
    /// Parsed chunks waiting for their turn, by `seq`.
    done: BTreeMap<u64, Job>,
    /// Chunks read so far (the next chunk's `seq`) and consumed so far; the difference is
    /// the chunks in flight.
    read: u64,
    consumed: u64,
    /// The input ended (or failed): no chunk after `read` will come.
    input_done: bool,
    /// The read error that ended the input; the caller returns it once every chunk read
    /// before it is consumed.
    read_error: Option<io::Error>,
    /// Buffers of consumed chunks, for reuse.
    spare: Vec<(Vec<u8>, Vec<Verdict>)>,
    /// The caller left: workers exit.
    closed: bool,
    /// A worker panicked; the chunk it held is lost, so the caller must not wait for it.
    worker_lost: bool,
}

struct Shared<R> {
    queue: Mutex<Queue>,
    input: Mutex<Input<R>>,
    max_in_flight: u64,
    /// Window closes the workers can help with; its `room` is signalled when a chunk is
    /// consumed (room to read ahead), the queue closes, or help is wanted (workers wait on
    /// it).
    assists: Arc<Assists>,
    /// Signalled when a chunk is parsed, the input ends or a worker is lost (the caller
    /// waits on it).
    progress: Condvar,
}

impl<R: Read> Shared<R> {
    /// Locks the queue. A poisoned lock only means another thread panicked while holding
    /// it; every critical section leaves the queue consistent between single operations,
    /// and a lost worker is reported through `worker_lost`, so the data is still usable.
    fn lock(&self) -> MutexGuard<'_, Queue> {
        self.queue.lock().unwrap_or_else(PoisonError::into_inner)
    }

    /// Reads the next chunk, waiting while another thread reads. `None` when the in-flight
    /// limit is reached, the input has ended (recorded, with its error if any) or the
    /// caller has left.
    fn read_chunk(&self) -> Option<Job> {
        let (mut bytes, verdicts) = {
            let mut q = self.lock();
            if q.input_done || q.closed || q.read - q.consumed >= self.max_in_flight {
                return None;
            }
            q.spare.pop().unwrap_or_default()
        };
        // A thread that panicked while reading may have left half a chunk behind: lines
        // would be lost, so the input is not used again (the caller reports the lost
        // worker).
        let Ok(mut input) = self.input.lock() else {
            self.lock().worker_lost = true;
            self.progress.notify_all();
            return None;
        };
        let outcome = input.reader.next_chunk(&mut bytes);
        let mut q = self.lock();
        match outcome {
            Ok(Some(len)) => {
                let seq = input.next_seq;
                input.next_seq += 1;
                q.read = input.next_seq;
                Some(Job {
                    seq,
                    bytes,
                    len,
                    verdicts,
                })
            }
            Ok(None) | Err(_) => {
                q.input_done = true;
                q.read_error = outcome.err();
                drop(q);
                self.progress.notify_all();
                self.assists.room.notify_all();
                None
            }
        }
    }
}

/// Closes the queue when the caller leaves (normally, by `?`, or by a panic), so that the
/// workers exit and `std::thread::scope` can join them instead of waiting forever.
struct CloseOnDrop<'a, R: Read>(&'a Shared<R>);

impl<R: Read> Drop for CloseOnDrop<'_, R> {
    fn drop(&mut self) {
        self.0.lock().closed = true;
        self.0.assists.room.notify_all();
    }
}

/// Marks the queue when a worker unwinds, so the caller stops waiting for its chunk.
struct ReportLoss<'a, R: Read>(&'a Shared<R>);

impl<R: Read> Drop for ReportLoss<'_, R> {
    fn drop(&mut self) {
        if std::thread::panicking() {
            self.0.lock().worker_lost = true;
            self.0.progress.notify_all();
        }
    }
}

/// Cuts the input into chunks that end on a line boundary (or at the end of the input).
///
/// A chunk's buffer is recycled with its initialised length intact and the chunk's own
/// length kept beside it: reading through `read_to_end` into a cleared buffer zeroed each
/// 64 KiB chunk again before reading into it, because a reader that counts bytes for the
/// progress bar cannot take uninitialised memory on stable Rust (2.3% of a replay's
/// instructions by callgrind, issue 9). Here each buffer is zeroed once, when it grows.
struct ChunkReader<R> {
    input: R,
    /// The incomplete last line of the previous read, carried into the next chunk.
    carry: Vec<u8>,
    eof: bool,
}

impl<R: Read> ChunkReader<R> {
    /// Fills `buf` with the next chunk of whole lines: `Some(len)`, the chunk being
    /// `buf[..len]` (bytes past it are left-overs of earlier use); `None` at the end.
    fn next_chunk(&mut self, buf: &mut Vec<u8>) -> io::Result<Option<usize>> {
        let mut len = self.carry.len();
        if buf.len() < len {
            buf.resize(len, 0);
        }
        buf[..len].copy_from_slice(&self.carry);
        self.carry.clear();
        let mut scanned = 0;
        loop {
            if self.eof {
                return Ok((len > 0).then_some(len));
            }
            if len >= CHUNK_BYTES {
                // Cut after the last newline; bytes already scanned hold none.
                if let Some(pos) = buf[scanned..len].iter().rposition(|b| *b == b'\n') {
                    let cut = scanned + pos + 1;
                    self.carry.extend_from_slice(&buf[cut..len]);
                    return Ok(Some(cut));
                }
                // One line longer than the chunk: keep reading until it ends.
                scanned = len;
            }
            // Up to a full chunk; past it (a long line) grow geometrically.
            let want = if len < CHUNK_BYTES {
                CHUNK_BYTES - len
            } else {
                len / 2
            };
            let target = len + want;
            if buf.len() < target {
                buf.resize(target, 0);
            }
            // Fewer bytes than asked only at the end of the input (a pipe may hand out
            // less per call); interrupted reads are retried, as `read_to_end` does.
            while len < target {
                match self.input.read(&mut buf[len..target]) {
                    Ok(0) => {
                        self.eof = true;
                        break;
                    }
                    Ok(n) => len += n,
                    Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
                    Err(e) => return Err(e),
                }
            }
        }
    }
}

/// Prepares every line of `job.bytes` into `job.verdicts` ([`split_lines`]), with the
/// calling thread's `shape` (speed only: the verdicts do not depend on it).
fn decode_job(decoder: &LineDecoder, job: &mut Job, shape: &mut LineShape) {
    let Job {
        bytes,
        len,
        verdicts,
        ..
    } = job;
    split_lines(&bytes[..*len], |line| {
        verdicts.push(decoder.prepare_raw_with(line, shape));
        Ok(())
    })
    .unwrap_or(());
}

/// Calls `each` with every line of a chunk, with the line rules of [`crate::app::pump`]:
/// a line ends at `\n` (the last one may lack it) and one trailing `\r` is removed. Stops
/// at the first error of `each`.
///
/// Lines come as [`RawLine::Text`] when they lie in a stretch of the chunk that one
/// `str::from_utf8` pass found valid, which costs half of checking each line on its own
/// (issue 9); a line with an invalid byte comes as [`RawLine::Bytes`], for the parser to
/// reject, and checking resumes after the invalid sequence. Each byte is checked at most
/// twice (see [`Utf8Stretch`]), so hostile input costs no more than linear time.
fn split_lines(
    bytes: &[u8],
    mut each: impl FnMut(RawLine<'_>) -> io::Result<()>,
) -> io::Result<()> {
    // A chunk is never empty; when it ends with '\n' that newline closes the last line
    // instead of starting an empty one.
    let body = bytes.strip_suffix(b"\n").unwrap_or(bytes);
    let mut stretch = Utf8Stretch::check(body, 0);
    let mut start = 0;
    loop {
        let end = memchr::memchr(b'\n', &body[start..]).map_or(body.len(), |at| start + at);
        // Move on to the stretch after an invalid sequence once no later line can lie in
        // the current one.
        while stretch.resume <= start && stretch.resume < body.len() {
            stretch = Utf8Stretch::check(body, stretch.resume);
        }
        let line = match stretch.text_of(start, end) {
            Some(text) => RawLine::Text(text.strip_suffix('\r').unwrap_or(text)),
            None => {
                let line = &body[start..end];
                RawLine::Bytes(line.strip_suffix(b"\r").unwrap_or(line))
            }
        };
        each(line)?;
        if end == body.len() {
            return Ok(());
        }
        start = end + 1;
    }
}

/// A stretch of valid UTF-8 in a chunk: `text` is `body[from..from + text.len()]`, and the
/// invalid sequence after it (if any) ends at `resume`, where checking goes on.
struct Utf8Stretch<'a> {
    text: &'a str,
    from: usize,
    resume: usize,
}

impl<'a> Utf8Stretch<'a> {
    /// The longest valid stretch of `body` from `from`. The stretch before an invalid
    /// sequence is checked a second time to obtain it as `&str` (without `unsafe`), so a
    /// byte is checked at most twice.
    fn check(body: &'a [u8], from: usize) -> Utf8Stretch<'a> {
        let rest = &body[from..];
        match std::str::from_utf8(rest) {
            Ok(text) => Utf8Stretch {
                text,
                from,
                resume: body.len(),
            },
            Err(err) => {
                let valid = err.valid_up_to();
                Utf8Stretch {
                    text: std::str::from_utf8(&rest[..valid]).unwrap_or_default(),
                    from,
                    // error_len None: the input ends inside a sequence.
                    resume: from + valid + err.error_len().unwrap_or(rest.len() - valid),
                }
            }
        }
    }

    /// `body[start..end]` as text, when this stretch holds all of it.
    fn text_of(&self, start: usize, end: usize) -> Option<&'a str> {
        let at = start.checked_sub(self.from)?;
        self.text.get(at..at + (end - start))
    }
}

/// Calls `each` with every line of `input` on the calling thread, reading it in chunks of
/// whole lines: the same lines as `BufRead::read_until(b'\n')` with a trailing `\n` and
/// then `\r` removed, without copying each line out of the read buffer (issue 9: the
/// one-thread replay). Returns the number of lines; stops at the first error.
pub fn for_each_line<R: Read>(
    input: R,
    mut each: impl FnMut(RawLine<'_>) -> io::Result<()>,
) -> io::Result<u64> {
    let mut reader = ChunkReader {
        input,
        carry: Vec::new(),
        eof: false,
    };
    let (mut buf, mut n_lines) = (Vec::new(), 0u64);
    while let Some(len) = reader.next_chunk(&mut buf)? {
        split_lines(&buf[..len], |line| {
            n_lines += 1;
            each(line)
        })?;
    }
    Ok(n_lines)
}

fn worker<R: Read>(shared: &Shared<R>, decoder: &LineDecoder) {
    let _loss = ReportLoss(shared);
    let mut shape = LineShape::new();
    loop {
        // A window close first: the engine thread is waiting for it.
        shared.assists.help();
        if let Some(mut job) = shared.read_chunk() {
            decode_job(decoder, &mut job, &mut shape);
            shared.lock().done.insert(job.seq, job);
            shared.progress.notify_one();
            continue;
        }
        // No chunk: wait for room to read ahead, unless there is nothing left to do. The
        // condition is checked under the lock the caller frees room under, so no wake-up
        // is lost.
        let mut q = shared.lock();
        loop {
            if q.closed || q.input_done || q.worker_lost {
                return;
            }
            if q.read - q.consumed < shared.max_in_flight || shared.assists.wanted() {
                break;
            }
            // Help is posted without this lock, so its wake-up can fall between the check
            // above and the wait: the timeout bounds that delay.
            q = shared
                .assists
                .room
                .wait_timeout(q, ASSIST_POLL)
                .unwrap_or_else(PoisonError::into_inner)
                .0;
        }
    }
}

/// Reads every line of `input`, prepares the lines on `threads` threads (the calling
/// thread included; `threads <= 1` prepares on the calling thread alone) and calls
/// `consume` with each prepared line in input order. Returns the number of lines.
///
/// Stops at the first error of `input` or `consume` and returns it; lines after it are not
/// consumed. Equivalent to calling `consume(decoder.prepare(line))` for every line that
/// `BufRead::read_until(b'\n')` would yield, with a trailing `\n` and then `\r` removed.
pub fn decode_in_order<R: Read + Send>(
    input: R,
    decoder: &LineDecoder,
    threads: usize,
    assists: &Arc<Assists>,
    mut consume: impl FnMut(Verdict) -> io::Result<()>,
) -> io::Result<u64> {
    let shared = Shared {
        queue: Mutex::new(Queue {
            done: BTreeMap::new(),
            read: 0,
            consumed: 0,
            input_done: false,
            read_error: None,
            spare: Vec::new(),
            closed: false,
            worker_lost: false,
        }),
        input: Mutex::new(Input {
            reader: ChunkReader {
                input,
                carry: Vec::new(),
                eof: false,
            },
            next_seq: 0,
        }),
        max_in_flight: CHUNKS_IN_FLIGHT_PER_THREAD * threads.max(1) as u64,
        assists: Arc::clone(assists),
        progress: Condvar::new(),
    };
    let n_workers = threads.saturating_sub(1);
    std::thread::scope(|scope| {
        for _ in 0..n_workers {
            scope.spawn(|| worker(&shared, decoder));
        }
        let _close = CloseOnDrop(&shared);
        let (mut next_consume, mut n_lines) = (0u64, 0u64);
        let mut shape = LineShape::new();
        loop {
            // The next chunk in order: already parsed, or read and parse one ourselves
            // (perhaps a later one), or wait for a worker.
            let mut job = {
                let mut q = shared.lock();
                loop {
                    if let Some(job) = q.done.remove(&next_consume) {
                        break job;
                    }
                    if q.input_done && next_consume >= q.read {
                        return match q.read_error.take() {
                            Some(e) => Err(e),
                            None => Ok(n_lines),
                        };
                    }
                    if q.worker_lost {
                        return Err(io::Error::other("a parse worker thread panicked"));
                    }
                    if !q.input_done && q.read - q.consumed < shared.max_in_flight {
                        drop(q);
                        if let Some(mut job) = shared.read_chunk() {
                            decode_job(decoder, &mut job, &mut shape);
                            if job.seq == next_consume {
                                break job;
                            }
                            q = shared.lock();
                            q.done.insert(job.seq, job);
                        } else {
                            q = shared.lock();
                        }
                        continue;
                    }
                    q = shared
                        .progress
                        .wait(q)
                        .unwrap_or_else(PoisonError::into_inner);
                }
            };
            for verdict in job.verdicts.drain(..) {
                n_lines += 1;
                consume(verdict)?;
            }
            next_consume += 1;
            {
                let mut q = shared.lock();
                q.consumed = next_consume;
                q.spare.push((job.bytes, job.verdicts));
            }
            shared.assists.room.notify_one();
        }
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The lines [`split_lines`] yields, with whether each came as text.
    fn split(bytes: &[u8]) -> Vec<(Vec<u8>, bool)> {
        let mut out = Vec::new();
        split_lines(bytes, |line| {
            out.push((line.as_bytes().to_vec(), matches!(line, RawLine::Text(_))));
            Ok(())
        })
        .expect("never fails");
        out
    }

    /// Every line of every sequence of up to four pieces (ASCII, multi-byte characters,
    /// invalid bytes, truncated and surrogate sequences, CR, LF) comes out with the bytes
    /// std's `split` gives (the reference), and as text exactly when std's `from_utf8`
    /// accepts it: a chunk's UTF-8 stretches never hide an invalid line nor withhold a
    /// valid one.
    #[test]
    fn split_lines_hands_text_exactly_for_valid_lines() {
        let pieces: [&[u8]; 10] = [
            b"ab",
            "\u{e9}".as_bytes(),
            "\u{1f600}".as_bytes(),
            b"\xff",
            b"\xc3",
            b"\xf0\x9f\x98",
            b"\xed\xa0\x80",
            b"\r",
            b"\n",
            b"\n\n",
        ];
        let mut cases = vec![Vec::new()];
        for _ in 0..4 {
            let longer: Vec<Vec<u8>> = cases
                .iter()
                .flat_map(|case| {
                    pieces.iter().map(move |p| {
                        let mut c = case.clone();
                        c.extend_from_slice(p);
                        c
                    })
                })
                .collect();
            cases.extend(longer);
        }
        cases.retain(|c| !c.is_empty());
        for case in &cases {
            let body = case.strip_suffix(b"\n").unwrap_or(case);
            let want: Vec<(Vec<u8>, bool)> = body
                .split(|&b| b == b'\n')
                .map(|line| {
                    let line = line.strip_suffix(b"\r").unwrap_or(line);
                    (line.to_vec(), std::str::from_utf8(line).is_ok())
                })
                .collect();
            assert_eq!(split(case), want, "{case:?}");
        }
    }

    use crate::config::Config;
    use crate::engine::noise::NoiseKey;
    use crate::engine::{Engine, EngineOptions};
    use std::io::BufRead;

    fn no_assists() -> Arc<Assists> {
        Arc::new(Assists::default())
    }

    fn decoder() -> LineDecoder {
        let config =
            Config::from_toml_str(crate::app::DEMO_CONFIG).expect("the demo config is valid");
        Engine::new(&config, NoiseKey::from_seed(7), EngineOptions::default())
            .expect("engine")
            .line_decoder()
    }

    /// The reference: `BufRead::read_until` line by line, as `app::pump` reads (std is the
    /// reference implementation of the line rules).
    fn sequential(input: &[u8], decoder: &LineDecoder) -> Vec<Verdict> {
        let mut reader = io::BufReader::new(input);
        let mut line = Vec::new();
        let mut out = Vec::new();
        loop {
            line.clear();
            if reader.read_until(b'\n', &mut line).expect("in memory") == 0 {
                return out;
            }
            let body = line.strip_suffix(b"\n").unwrap_or(&line);
            let body = body.strip_suffix(b"\r").unwrap_or(body);
            out.push(decoder.prepare(body));
        }
    }

    /// The verdicts of the lines [`for_each_line`] yields, reading `step` bytes at a time.
    fn lines_of(input: &[u8], step: usize) -> Vec<Verdict> {
        let decoder = decoder();
        let mut out = Vec::new();
        let n = for_each_line(Trickle { data: input, step }, |line| {
            out.push(decoder.prepare_raw_with(line, &mut LineShape::new()));
            Ok(())
        })
        .expect("in memory");
        assert_eq!(n as usize, out.len());
        out
    }

    /// A reader that hands out at most `step` bytes per call, as a pipe would.
    struct Trickle<'a> {
        data: &'a [u8],
        step: usize,
    }

    impl Read for Trickle<'_> {
        fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
            let n = self.step.min(buf.len()).min(self.data.len());
            buf[..n].copy_from_slice(&self.data[..n]);
            self.data = &self.data[n..];
            Ok(n)
        }
    }

    /// A reader whose every other call fails with `Interrupted` (a signal during `read`),
    /// which must be retried, not reported.
    struct Interrupting<R> {
        inner: R,
        fail_next: bool,
    }

    impl<R: Read> Read for Interrupting<R> {
        fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
            self.fail_next = !self.fail_next;
            if !self.fail_next {
                return Err(io::ErrorKind::Interrupted.into());
            }
            self.inner.read(buf)
        }
    }

    #[test]
    fn interrupted_reads_are_retried() {
        let decoder = decoder();
        let input = mixed_input();
        let expected = sequential(&input, &decoder);
        for threads in [1, 2] {
            let reader = Interrupting {
                inner: Trickle {
                    data: &input,
                    step: 4093,
                },
                fail_next: false,
            };
            let mut got = Vec::new();
            decode_in_order(reader, &decoder, threads, &no_assists(), |v| {
                got.push(v);
                Ok(())
            })
            .expect("interruptions are retried");
            assert_eq!(got, expected, "threads {threads}");
        }
    }

    fn parallel(input: &[u8], decoder: &LineDecoder, threads: usize, step: usize) -> Vec<Verdict> {
        let mut out = Vec::new();
        let n = decode_in_order(
            Trickle { data: input, step },
            decoder,
            threads,
            &no_assists(),
            |v| {
                out.push(v);
                Ok(())
            },
        )
        .expect("in memory");
        assert_eq!(n as usize, out.len());
        out
    }

    /// A few chunks of demo lines with dirt, CRLF endings, blank lines, a line longer than
    /// a chunk and no final newline.
    fn mixed_input() -> Vec<u8> {
        let spec = crate::demo::FeedSpec {
            n_cards: 5000,
            days: 1,
            ..Default::default()
        };
        let mut input = Vec::new();
        for (i, line) in crate::demo::DemoFeed::new(&spec).take(8000).enumerate() {
            input.extend_from_slice(&line);
            input.extend_from_slice(if i % 7 == 0 { b"\r\n" } else { b"\n" });
            // Invalid UTF-8 (rejected) and valid multi-byte text (an unknown zone) in
            // many chunks: a chunk's UTF-8 check must not change any verdict.
            if i % 97 == 0 {
                input.extend_from_slice(b"{\"zone\":\"\xff\"}\n");
                input.extend_from_slice("{\"zone\":\"h\u{e4}fen\"}\n".as_bytes());
            }
            if i == 3000 {
                input.extend_from_slice(b"\n\r\n");
                input.extend_from_slice(&vec![b' '; CHUNK_BYTES + 10]);
                input.push(b'\n');
            }
        }
        input.extend_from_slice(b"{\"ts\":1}");
        input
    }

    #[test]
    fn verdicts_match_read_until_for_any_thread_count_and_read_size() {
        let decoder = decoder();
        let input = mixed_input();
        assert!(
            input.len() > 3 * CHUNK_BYTES,
            "the input must span several chunks"
        );
        let expected = sequential(&input, &decoder);
        assert!(expected.iter().any(|p| p.rejection().is_some()));
        assert!(expected.iter().any(|p| p.rejection().is_none()));
        for threads in [1, 2, 3] {
            for step in [usize::MAX, 4093] {
                assert_eq!(
                    parallel(&input, &decoder, threads, step),
                    expected,
                    "threads {threads}, read size {step}"
                );
            }
        }
        for step in [usize::MAX, 4093, 1] {
            assert_eq!(
                lines_of(&input, step),
                expected,
                "one thread, read size {step}"
            );
        }
    }

    #[test]
    fn edge_inputs_match_read_until() {
        let decoder = decoder();
        for input in [
            &b""[..],
            b"\n",
            b"\n\n",
            b"\r\n",
            b"x",
            b"x\n",
            b"\r",
            b"a\r\r\n",
        ] {
            assert_eq!(
                parallel(input, &decoder, 2, 1),
                sequential(input, &decoder),
                "{input:?}"
            );
            assert_eq!(lines_of(input, 1), sequential(input, &decoder), "{input:?}");
        }
    }

    #[test]
    fn a_consumer_error_stops_the_pool_and_is_returned() {
        let decoder = decoder();
        let input = mixed_input();
        let mut seen = 0;
        let result = decode_in_order(&input[..], &decoder, 2, &no_assists(), |_| {
            seen += 1;
            if seen == 2500 {
                Err(io::Error::other("sink full"))
            } else {
                Ok(())
            }
        });
        assert_eq!(
            result.map_err(|e| e.to_string()).expect_err("stops"),
            "sink full"
        );
        assert_eq!(seen, 2500);
    }

    /// A window close posted on the pool's `Assists` mid-stream (as the engine does) is
    /// summed exactly, whoever takes its blocks, and the lines still come in order.
    #[test]
    fn a_posted_close_is_summed_while_lines_are_decoded() {
        use crate::engine::contribution::Contributor;
        use crate::engine::plan::Plan;
        let plan = Plan::new(&Config::from_toml_str(crate::app::DEMO_CONFIG).expect("config"))
            .expect("plan");
        let contributor = Arc::new(Contributor::new(&plan));
        let decoder = decoder();
        let input = mixed_input();
        let expected = sequential(&input, &decoder);
        // The survivors: the accepted events of the input, every third dropped.
        let events: Vec<_> = expected.iter().filter_map(|p| p.event().cloned()).collect();
        assert!(events.len() > 5_000, "{} events", events.len());
        let kept: Vec<bool> = (0..events.len()).map(|i| i % 3 != 0).collect();
        let zero = || crate::engine::contribution::zero_aggregate(&plan);
        let mut want = zero();
        contributor.add_kept(&events, &kept, &mut want, 1);
        for threads in [2, 3] {
            let assists = no_assists();
            let mut got = zero();
            let mut seen = Vec::new();
            decode_in_order(&input[..], &decoder, threads, &assists, |v| {
                seen.push(v);
                if seen.len() % 2_000 == 0 {
                    let mut part = zero();
                    let sum = Arc::new(SharedSum::new(
                        contributor.clone(),
                        events.clone(),
                        kept.clone(),
                        &part,
                    ));
                    assists.post(Arc::clone(&sum));
                    sum.finish(&mut part);
                    assists.withdraw();
                    got = part;
                    assert_eq!(got, want, "threads {threads}");
                }
                Ok(())
            })
            .expect("in memory");
            assert_eq!(seen, expected);
            assert_eq!(got, want);
        }
    }
}
