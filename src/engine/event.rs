//! The input boundary: turns one JSON line of the feed into a validated [`Event`], or into a
//! [`Rejection`] that names a reason and, where one is at fault, the schema field.
//!
//! # How a line is read
//! 1. More than `max_line_bytes` bytes: [`RejectReason::LineTooLong`], before anything else
//!    looks at the bytes (a hostile feed must not make us scan megabytes).
//! 2. Only JSON whitespace (space, tab, LF, CR; RFC 8259 §2): [`RejectReason::EmptyLine`].
//! 3. Not UTF-8: [`RejectReason::InvalidUtf8`] (RFC 8259 §8.1 requires UTF-8). A line
//!    handed over as [`RawLine::Text`] has passed this check in its reader, which checks
//!    whole chunks of input at once (`scrim replay`'s readers).
//! 4. The first non-whitespace byte is not `{`: the line is only checked for well-formedness
//!    ([`RejectReason::NotAnObject`] or [`RejectReason::InvalidJson`]).
//! 5. The **fast path**: one strict pass of a hand-written scanner over a subset of JSON: a
//!    flat object whose keys and string values have no escapes and no control characters,
//!    whose other values are numbers (RFC 8259 §6 grammar exactly), `true`, `false` or
//!    `null`, with JSON whitespace between tokens and nothing after the closing `}`. Keys and
//!    category values are matched by length and 8-byte words (no `memcmp` call); only the
//!    numbers of schema fields are converted. Anything outside the subset (an escape, a
//!    nested array or object, any syntax irregularity, an integer beyond `u64`, a float with
//!    more than 19 digits or 9 exponent digits, a float that overflows `f64`) makes the fast
//!    path give up without a verdict, and step 6 reads the line from scratch. So the fast
//!    path never decides a syntax rejection: it answers only for lines that are well-formed.
//!    Before it, a reader that carries a [`LineShape`] ([`LineParser::parse_with_shape`],
//!    what the engine and the parse workers use) tries the **shape path**: the gaps between
//!    the values (whitespace, braces, commas, keys, colons) of the last line the fast path
//!    accepted are compared byte for byte, so the keys are neither scanned nor looked up,
//!    and the values are read by the fast path's own readers. A line that differs anywhere
//!    outside its values, or has any faulty field, goes on to the fast path as if there
//!    were no shape, so the shape path only ever accepts, and only what the fast path would.
//! 6. The **serde path** ([`LineParser::parse_serde`], the reference): one pass of serde_json
//!    over the text with a visitor that looks at every top-level key once: schema fields are
//!    interpreted on the spot (strings are borrowed, never copied), every other key is
//!    skipped with [`serde::de::IgnoredAny`], which serde_json walks with an explicit stack,
//!    so deep nesting in an ignored key costs neither recursion nor memory.
//!
//! Why both paths give identical results: on a line the fast path accepts, serde_json meets
//! no syntax error either, so its verdict is decided by the per-key logic alone. Both paths
//! feed the same keys in the same order to the same per-key logic (`LineScan::entry`: skip
//! unknown keys, skip after a fault, DuplicateField on a second occurrence, else interpret)
//! and finish with the same `LineScan::finish`. The values they hand over are the same: a
//! string is the same borrowed text (no escapes, so nothing to unescape); a number is the
//! variant serde_json 1.0.154's `deserialize_any` produces (`de.rs`, `parse_integer` and
//! `parse_number`): a non-negative integer that fits `u64` is `U64`, a negative one `I64` when
//! it fits, but `-0` and magnitudes above 2^63 are `F64` of the negated magnitude (so `-0` is
//! `-0.0`); a fraction or exponent is the correctly rounded `f64` (serde_json's
//! `float_roundtrip` feature uses a correctly rounded algorithm, so does `str::parse::<f64>`,
//! and so does the exact Clinger fast path for at most 2^53 with a power of ten up to 10^22).
//! The unit hash is called with the same canonical text and as often (at most once) on both
//! paths: the fast path records the text and calls the caller's hash only when it answers.
//! The differential tests (unit tests here, a proptest, the hostile-line run in
//! `tests/parser_hostile.rs` and the `parse_diff` fuzz target) compare the two bit for bit.
//!
//! # Which reason wins when a line has several faults
//! Syntax first: a line that is not one well-formed JSON text (truncated, trailing garbage,
//! bad escapes, raw control characters in strings) is [`RejectReason::InvalidJson`] even if
//! an earlier field was also wrong, so the reason never depends on where a line was cut.
//! Among well-formed lines, the first semantic fault in line order wins, and
//! [`RejectReason::MissingField`] (known only at the end) comes last. The visitor therefore
//! keeps parsing after the first fault, only to check syntax.
//!
//! # Privacy
//! The unit id is hashed inside [`LineParser::parse`] by the caller's keyed hash and never
//! stored. A [`Rejection`] carries only a reason and a schema field name (configuration, not
//! data), so logging or counting rejections cannot leak line content.

use std::cell::RefCell;
use std::fmt;
use std::sync::Arc;

use serde::de::{self, DeserializeSeed, IgnoredAny, MapAccess, SeqAccess, Visitor};

use crate::engine::time::{MAX_EVENT_TIME, MIN_EVENT_TIME, Millis};

/// Longest accepted unit id string, in UTF-8 bytes after JSON unescaping. Longer ids are not
/// card numbers but garbage or an attempt to make the hash do work (a project choice).
pub const MAX_UNIT_ID_BYTES: usize = 256;

/// Largest accepted magnitude of a numeric field ("absurd" above this).
///
/// Why 1e15: it is below 2^53 ≈ 9.007e15, so every accepted JSON integer converts to `f64`
/// exactly (IEEE 754 binary64 has a 53-bit significand), and no plausible reading of fares,
/// distances or durations comes near it. This is input hygiene against broken readers, not a
/// privacy bound: the statistics clamp values to their declared ranges anyway.
pub const MAX_ABS_NUMBER: f64 = 1e15;

/// The same bound as an integer, so integers are compared exactly rather than after rounding.
const MAX_ABS_INTEGER: u64 = 1_000_000_000_000_000;

/// What the configuration asks the parser to extract from every line.
#[derive(Clone, Debug, PartialEq)]
pub struct Schema {
    /// The event-time field: an RFC 3339 string or integer epoch milliseconds.
    pub time_field: String,
    /// The privacy-unit field; `None` for event-level privacy.
    pub unit_field: Option<String>,
    /// Category fields with their declared public domain (index = position in the list).
    pub categories: Vec<(String, Vec<String>)>,
    /// Numeric fields (f64).
    pub numbers: Vec<String>,
    /// Longest accepted line in bytes, as handed to [`LineParser::parse`].
    pub max_line_bytes: usize,
}

/// Category indices of one event, inline up to four fields (no heap allocation per event
/// for typical schemas; more fields spill to the heap transparently).
pub type Categories = smallvec::SmallVec<[u32; 4]>;

/// Numeric values of one event, inline up to eight fields.
pub type Numbers = smallvec::SmallVec<[f64; 8]>;

/// `len` categories not seen yet. Inline lengths take the buffer as a whole, without the
/// element-by-element fill of `smallvec!` (issue 9: 2% of replay).
fn unseen_categories(len: usize) -> Categories {
    if len <= 4 {
        Categories::from_buf_and_len([CATEGORY_UNSEEN; 4], len)
    } else {
        smallvec::smallvec![CATEGORY_UNSEEN; len]
    }
}

/// `len` numbers not seen yet (NaN), as [`unseen_categories`].
fn absent_numbers(len: usize) -> Numbers {
    if len <= 8 {
        Numbers::from_buf_and_len([f64::NAN; 8], len)
    } else {
        smallvec::smallvec![f64::NAN; len]
    }
}

/// One input line (without its newline) as a reader hands it to the parser: raw bytes,
/// or text its reader has already found to be UTF-8. Readers that check whole chunks of
/// input at once hand text (issue 9: checking each line on its own cost 5% of a replay,
/// twice what one pass over the chunk costs); the verdict is the same for both forms.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum RawLine<'l> {
    /// Bytes not checked yet (the parser checks them: step 3 of the module documentation).
    Bytes(&'l [u8]),
    /// Valid UTF-8, by its type.
    Text(&'l str),
}

impl<'l> RawLine<'l> {
    /// The line's bytes.
    pub fn as_bytes(&self) -> &'l [u8] {
        match *self {
            RawLine::Bytes(bytes) => bytes,
            RawLine::Text(text) => text.as_bytes(),
        }
    }
}

/// A validated event. `categories[i]` is the domain index of `schema.categories[i]`;
/// `numbers[i]` the value of `schema.numbers[i]`; `unit` the keyed hash of the unit id.
#[derive(Clone, Debug, PartialEq)]
pub struct Event {
    /// Event time, within [`MIN_EVENT_TIME`, `MAX_EVENT_TIME`].
    pub time: Millis,
    /// Keyed hash of the unit id's canonical text; `None` when the schema has no unit field.
    pub unit: Option<u64>,
    /// Domain index of each category field, in schema order.
    pub categories: Categories,
    /// Value of each numeric field, in schema order; finite with `|x| <= 1e15`.
    pub numbers: Numbers,
}

impl Event {
    /// Whether two events are identical with numbers compared bit for bit (so `-0.0` and
    /// `0.0` differ): the identity the parser's fast and serde_json paths promise, checked by
    /// the unit tests, `tests/parser_hostile.rs` and the `parse_diff` fuzz target.
    pub fn same_bits(&self, other: &Event) -> bool {
        self.time == other.time
            && self.unit == other.unit
            && self.categories == other.categories
            && self.numbers.len() == other.numbers.len()
            && self
                .numbers
                .iter()
                .zip(&other.numbers)
                .all(|(x, y)| x.to_bits() == y.to_bits())
    }
}

/// Whether two parse results are identical: events by [`Event::same_bits`], rejections by
/// reason and field.
pub fn same_parse_result(a: &Result<Event, Rejection>, b: &Result<Event, Rejection>) -> bool {
    match (a, b) {
        (Ok(x), Ok(y)) => x.same_bits(y),
        (Err(x), Err(y)) => x == y,
        _ => false,
    }
}

/// Why a schema cannot be turned into a parser.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum SchemaError {
    /// A field name is the empty string.
    #[error("input field names must not be empty")]
    EmptyFieldName,
    /// The same name is used for two roles (time, unit, a category, a number) or twice in one
    /// list; a line could not say which one it meant.
    #[error("input field '{field}' is used twice: each field may have only one role")]
    DuplicateField {
        /// The repeated field name.
        field: String,
    },
    /// A category field without any allowed value would reject every line.
    #[error("category field '{field}' has no values: list at least one")]
    EmptyDomain {
        /// The category field.
        field: String,
    },
    /// A category value listed twice would have two domain indices.
    #[error("category field '{field}' lists the value '{value}' twice: values must be unique")]
    DuplicateValue {
        /// The category field.
        field: String,
        /// The repeated value (configuration, not data).
        value: String,
    },
    /// Domain indices are `u32`, and `u32::MAX` is reserved as the parser's "not seen" mark.
    #[error("category field '{field}' has {n_values} values: at most 4294967294 are supported")]
    DomainTooLarge {
        /// The category field.
        field: String,
        /// How many values it lists.
        n_values: usize,
    },
    /// A zero limit would reject every line.
    #[error("max_line_bytes must be at least 1")]
    ZeroMaxLineBytes,
}

/// Why a line was rejected. Stable: [`RejectReason::label`] is a Prometheus label value.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
#[non_exhaustive]
pub enum RejectReason {
    /// Nothing but JSON whitespace.
    EmptyLine,
    /// More bytes than `max_line_bytes`.
    LineTooLong,
    /// The bytes are not UTF-8.
    InvalidUtf8,
    /// Not one well-formed JSON text (RFC 8259), e.g. truncated or with trailing garbage.
    InvalidJson,
    /// Well-formed JSON whose top level is not an object.
    NotAnObject,
    /// A schema field appears more than once in the object.
    DuplicateField,
    /// A schema field is absent.
    MissingField,
    /// A category or numeric field has the wrong JSON type (e.g. a number sent as a string).
    WrongType,
    /// The time field is not an RFC 3339 string or integer epoch milliseconds in range
    /// (this includes a wrong JSON type for the time field).
    BadTimestamp,
    /// A numeric field is not finite or its magnitude exceeds [`MAX_ABS_NUMBER`].
    NumberOutOfRange,
    /// A category value outside its declared domain.
    UnknownCategory,
    /// The unit id is not a non-empty string of at most [`MAX_UNIT_ID_BYTES`] bytes or a
    /// JSON integer that fits 64 bits.
    BadUnitId,
}

impl RejectReason {
    /// Every reason, in declaration order; `ALL[r.index()] == r`.
    pub const ALL: [RejectReason; 12] = [
        RejectReason::EmptyLine,
        RejectReason::LineTooLong,
        RejectReason::InvalidUtf8,
        RejectReason::InvalidJson,
        RejectReason::NotAnObject,
        RejectReason::DuplicateField,
        RejectReason::MissingField,
        RejectReason::WrongType,
        RejectReason::BadTimestamp,
        RejectReason::NumberOutOfRange,
        RejectReason::UnknownCategory,
        RejectReason::BadUnitId,
    ];

    /// The snake_case name used as the `reason` label of `scrim_rejected_events_total`.
    /// Part of the outside contract: never rename one.
    pub fn label(&self) -> &'static str {
        match self {
            RejectReason::EmptyLine => "empty_line",
            RejectReason::LineTooLong => "line_too_long",
            RejectReason::InvalidUtf8 => "invalid_utf8",
            RejectReason::InvalidJson => "invalid_json",
            RejectReason::NotAnObject => "not_an_object",
            RejectReason::DuplicateField => "duplicate_field",
            RejectReason::MissingField => "missing_field",
            RejectReason::WrongType => "wrong_type",
            RejectReason::BadTimestamp => "bad_timestamp",
            RejectReason::NumberOutOfRange => "number_out_of_range",
            RejectReason::UnknownCategory => "unknown_category",
            RejectReason::BadUnitId => "bad_unit_id",
        }
    }

    /// Position in [`RejectReason::ALL`], for dense per-reason counters.
    pub fn index(&self) -> usize {
        *self as usize
    }

    /// The reason whose [`label`](RejectReason::label) is `label`.
    pub fn from_label(label: &str) -> Option<RejectReason> {
        RejectReason::ALL.into_iter().find(|r| r.label() == label)
    }

    /// A short lowercase explanation for logs and the demo summary.
    fn explanation(&self) -> &'static str {
        match self {
            RejectReason::EmptyLine => "empty line",
            RejectReason::LineTooLong => "line longer than max_line_bytes",
            RejectReason::InvalidUtf8 => "line is not valid utf-8",
            RejectReason::InvalidJson => "line is not one well-formed json text",
            RejectReason::NotAnObject => "line is json but not an object",
            RejectReason::DuplicateField => "a schema field appears twice",
            RejectReason::MissingField => "a schema field is missing",
            RejectReason::WrongType => "a field has the wrong json type",
            RejectReason::BadTimestamp => {
                "time is not an rfc 3339 string or integer epoch milliseconds in range"
            }
            RejectReason::NumberOutOfRange => "number is not finite or its magnitude exceeds 1e15",
            RejectReason::UnknownCategory => "category value is not in the declared list",
            RejectReason::BadUnitId => {
                "unit id is not a non-empty string of at most 256 bytes or a 64-bit integer"
            }
        }
    }
}

impl fmt::Display for RejectReason {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.explanation())
    }
}

/// A rejected line: the reason and the schema field at fault. Never holds line content.
#[derive(Clone, Debug, PartialEq, Eq, Hash)]
pub struct Rejection {
    /// Why the line was rejected.
    pub reason: RejectReason,
    /// The schema field at fault (a configuration name, never data); `None` for reasons about
    /// the whole line (empty, too long, not UTF-8, not JSON, not an object).
    pub field: Option<Arc<str>>,
}

impl fmt::Display for Rejection {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match &self.field {
            Some(field) => write!(f, "{} (field '{field}')", self.reason),
            None => write!(f, "{}", self.reason),
        }
    }
}

impl std::error::Error for Rejection {}

impl Rejection {
    /// A rejection about the whole line.
    fn line(reason: RejectReason) -> Rejection {
        Rejection {
            reason,
            field: None,
        }
    }
}

/// Which part of the [`Event`] a schema field fills.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Slot {
    Time,
    Unit,
    /// Index into `Schema::categories`.
    Category(usize),
    /// Index into `Schema::numbers`.
    Number(usize),
}

/// Marks a category slot not yet seen in the current line. Never a real index because
/// [`LineParser::new`] refuses domains with `u32::MAX` or more values.
const CATEGORY_UNSEEN: u32 = u32::MAX;

/// Exact-match lookup of names (schema keys, category values) by their bytes, built for the
/// short names of a schema: open addressing over a hash of the name, then the length and
/// two words compared as `u64`s (for names of up to 16 bytes these decide equality; longer
/// names are then compared in 8-byte words), so a lookup costs one hash and usually one
/// comparison, calls no `memcmp`, and never allocates. The table is filled from
/// configuration only, so line content cannot lengthen its probe chains.
#[derive(Debug)]
struct NameTable<V> {
    /// The names, in the order given (for the full comparison of long names).
    names: Vec<Box<[u8]>>,
    /// Open addressing, entries inline so a lookup reads one bucket: a power-of-two length
    /// at least twice the number of names, so every probe sequence meets an empty bucket.
    buckets: Box<[NameBucket<V>]>,
    /// `64 - log2(buckets.len())`: a hash's top bits pick the first bucket.
    shift: u32,
}

#[derive(Clone, Copy, Debug)]
struct NameBucket<V> {
    /// The name's length; [`EMPTY_BUCKET`] for an empty bucket.
    len: usize,
    /// [`name_words`] of the name.
    words: (u64, u64),
    /// Index into `NameTable::names`.
    index: usize,
    value: Option<V>,
}

/// The `len` of an empty bucket (no name is that long).
const EMPTY_BUCKET: usize = usize::MAX;

/// Knuth's multiplicative hashing constant, 2^64 divided by the golden ratio.
const HASH_MULTIPLIER: u64 = 0x9e37_79b9_7f4a_7c15;

/// Longest name whose length and [`name_words`] alone decide equality.
const SHORT_NAME: usize = 16;

/// Two words that, together with the length, determine a name of up to [`SHORT_NAME`]
/// bytes: the first and the last 8 (or 4) bytes, overlapping when the name is shorter than
/// two of them, or three sampled bytes below 4 (the loads wyhash uses). Longer names share
/// the words of their first and last 8 bytes and are told apart by [`same_bytes`].
#[inline]
fn name_words(name: &[u8]) -> (u64, u64) {
    let len = name.len();
    if len >= 8 {
        let first = name
            .first_chunk::<8>()
            .map_or(0, |w| u64::from_le_bytes(*w));
        let last = name.last_chunk::<8>().map_or(0, |w| u64::from_le_bytes(*w));
        (first, last)
    } else if len >= 4 {
        let first = name
            .first_chunk::<4>()
            .map_or(0, |w| u32::from_le_bytes(*w));
        let last = name.last_chunk::<4>().map_or(0, |w| u32::from_le_bytes(*w));
        (u64::from(first) | (u64::from(last) << 32), 0)
    } else if let (Some(&a), Some(&b), Some(&c)) = (name.first(), name.get(len / 2), name.last()) {
        (u64::from(a) | (u64::from(b) << 8) | (u64::from(c) << 16), 0)
    } else {
        (0, 0)
    }
}

/// The bucket hash: the length and words, and for long names every byte.
#[inline]
fn name_hash(name: &[u8], (first, last): (u64, u64)) -> u64 {
    let mut h = (name.len() as u64).wrapping_mul(HASH_MULTIPLIER) ^ first;
    if name.len() > SHORT_NAME {
        let (words, _) = name.as_chunks::<8>();
        for word in words {
            h = (h ^ u64::from_le_bytes(*word))
                .wrapping_mul(HASH_MULTIPLIER)
                .rotate_left(31);
        }
    }
    (h ^ last.rotate_left(32)).wrapping_mul(HASH_MULTIPLIER)
}

/// Byte equality without `memcmp`: length first, then 8-byte words, then the tail.
#[inline]
fn same_bytes(a: &[u8], b: &[u8]) -> bool {
    if a.len() != b.len() {
        return false;
    }
    let ((wa, ta), (wb, tb)) = (a.as_chunks::<8>(), b.as_chunks::<8>());
    wa.iter()
        .zip(wb)
        .all(|(x, y)| u64::from_le_bytes(*x) == u64::from_le_bytes(*y))
        && ta.iter().zip(tb).all(|(x, y)| x == y)
}

impl<V: Copy> NameTable<V> {
    /// A table of distinct names (the caller has checked there are no repeats).
    fn new(names: Vec<(Box<str>, V)>) -> NameTable<V> {
        let n_buckets = (2 * names.len()).max(8).next_power_of_two();
        let shift = 64 - n_buckets.trailing_zeros();
        let empty = NameBucket {
            len: EMPTY_BUCKET,
            words: (0, 0),
            index: 0,
            value: None,
        };
        let mut buckets = vec![empty; n_buckets].into_boxed_slice();
        let mask = n_buckets - 1;
        let mut stored = Vec::with_capacity(names.len());
        for (index, (name, value)) in names.into_iter().enumerate() {
            let name: Box<[u8]> = name.into_boxed_bytes();
            let words = name_words(&name);
            let mut b = (name_hash(&name, words) >> shift) as usize & mask;
            // Terminates: at most half of the buckets are ever taken.
            while buckets
                .get(b)
                .is_some_and(|taken| taken.len != EMPTY_BUCKET)
            {
                b = (b + 1) & mask;
            }
            if let Some(bucket) = buckets.get_mut(b) {
                *bucket = NameBucket {
                    len: name.len(),
                    words,
                    index,
                    value: Some(value),
                };
            }
            stored.push(name);
        }
        NameTable {
            names: stored,
            buckets,
            shift,
        }
    }

    /// The value of `name`, if it is in the table (exact byte match).
    #[inline]
    fn get(&self, name: &[u8]) -> Option<V> {
        let words = name_words(name);
        let mask = self.buckets.len() - 1;
        let mut b = (name_hash(name, words) >> self.shift) as usize & mask;
        loop {
            // An empty bucket ends the probe sequence; one exists (see `buckets`).
            let bucket = self.buckets.get(b)?;
            if bucket.len == EMPTY_BUCKET {
                return None;
            }
            if bucket.words == words
                && bucket.len == name.len()
                && (name.len() <= SHORT_NAME
                    || self
                        .names
                        .get(bucket.index)
                        .is_some_and(|stored| same_bytes(stored, name)))
            {
                return bucket.value;
            }
            b = (b + 1) & mask;
        }
    }
}

/// Parses lines against one [`Schema`]; built once, shared by reference.
///
/// Lookups are `NameTable`s: key names and category values are matched as bytes borrowed
/// from the line (never allocating), by hash, length and 8-byte words.
#[derive(Debug)]
pub struct LineParser {
    schema: Schema,
    /// Every schema field name with its slot.
    keys: NameTable<Slot>,
    /// Per category field: its values with their domain index.
    domains: Vec<NameTable<u32>>,
    /// Shared copies of the field names for [`Rejection::field`] (cloning is a refcount bump).
    time_name: Arc<str>,
    unit_name: Option<Arc<str>>,
    category_names: Vec<Arc<str>>,
    number_names: Vec<Arc<str>>,
}

impl LineParser {
    /// Checks the schema (no empty or repeated names, non-empty domains without repeats, a
    /// positive line limit) and builds the lookup tables.
    pub fn new(schema: Schema) -> Result<LineParser, SchemaError> {
        if schema.max_line_bytes == 0 {
            return Err(SchemaError::ZeroMaxLineBytes);
        }
        let mut keys: Vec<(Box<str>, Slot)> = Vec::new();
        keys.push((schema.time_field.as_str().into(), Slot::Time));
        if let Some(unit) = &schema.unit_field {
            keys.push((unit.as_str().into(), Slot::Unit));
        }
        for (i, (name, _)) in schema.categories.iter().enumerate() {
            keys.push((name.as_str().into(), Slot::Category(i)));
        }
        for (i, name) in schema.numbers.iter().enumerate() {
            keys.push((name.as_str().into(), Slot::Number(i)));
        }
        if keys.iter().any(|(name, _)| name.is_empty()) {
            return Err(SchemaError::EmptyFieldName);
        }
        keys.sort_by(|a, b| a.0.cmp(&b.0));
        if let Some(pair) = keys.windows(2).find(|pair| pair[0].0 == pair[1].0) {
            return Err(SchemaError::DuplicateField {
                field: pair[0].0.to_string(),
            });
        }

        let mut domains = Vec::with_capacity(schema.categories.len());
        for (field, values) in &schema.categories {
            if values.is_empty() {
                return Err(SchemaError::EmptyDomain {
                    field: field.clone(),
                });
            }
            // Indices must stay below CATEGORY_UNSEEN (u32::MAX).
            if values.len() >= CATEGORY_UNSEEN as usize {
                return Err(SchemaError::DomainTooLarge {
                    field: field.clone(),
                    n_values: values.len(),
                });
            }
            let mut table: Vec<(Box<str>, u32)> = Vec::with_capacity(values.len());
            for (idx, value) in values.iter().enumerate() {
                // Cannot fail: values.len() < u32::MAX was checked above.
                let idx = u32::try_from(idx).map_err(|_| SchemaError::DomainTooLarge {
                    field: field.clone(),
                    n_values: values.len(),
                })?;
                table.push((value.as_str().into(), idx));
            }
            table.sort_by(|a, b| a.0.cmp(&b.0));
            if let Some(pair) = table.windows(2).find(|pair| pair[0].0 == pair[1].0) {
                return Err(SchemaError::DuplicateValue {
                    field: field.clone(),
                    value: pair[0].0.to_string(),
                });
            }
            domains.push(NameTable::new(table));
        }

        Ok(LineParser {
            time_name: schema.time_field.as_str().into(),
            unit_name: schema.unit_field.as_deref().map(Arc::from),
            category_names: schema
                .categories
                .iter()
                .map(|(n, _)| Arc::from(n.as_str()))
                .collect(),
            number_names: schema
                .numbers
                .iter()
                .map(|n| Arc::from(n.as_str()))
                .collect(),
            keys: NameTable::new(keys),
            domains,
            schema,
        })
    }

    /// The schema this parser was built from.
    pub fn schema(&self) -> &Schema {
        &self.schema
    }

    /// Parses one line (without its terminator; a trailing CR or LF is tolerated as JSON
    /// whitespace but counts towards `max_line_bytes`).
    ///
    /// `unit_hash` maps the raw unit id bytes (its canonical text: the string after JSON
    /// unescaping, or the decimal integer, so `"42"` and `42` are the same unit) to u64; the
    /// engine passes a keyed hash. The raw id never leaves this call. It is called at most
    /// once per line, and only for a well-formed unit id.
    ///
    /// Never panics; see the module documentation for which reason wins.
    pub fn parse(&self, line: &[u8], unit_hash: &dyn Fn(&[u8]) -> u64) -> Result<Event, Rejection> {
        let text = self.object_text(RawLine::Bytes(line))?;
        match self.parse_fast(text, unit_hash) {
            Some(result) => result,
            None => self.parse_object_serde(text, unit_hash),
        }
    }

    /// The serde_json reference path: the same checks and the same verdicts as
    /// [`LineParser::parse`], which gives identical results (numbers bit for bit) and only
    /// runs faster. Kept public as the yardstick of issue 9's floor (`examples/parse_floor`)
    /// and for the differential tests.
    pub fn parse_serde(
        &self,
        line: &[u8],
        unit_hash: &dyn Fn(&[u8]) -> u64,
    ) -> Result<Event, Rejection> {
        let text = self.object_text(RawLine::Bytes(line))?;
        self.parse_object_serde(text, unit_hash)
    }

    /// Steps 1 to 4 of the module documentation: the line as text whose first
    /// non-whitespace byte is `{`, or the rejection of the whole line. Step 3 (UTF-8) is
    /// skipped for a [`RawLine::Text`], which is valid UTF-8 by its type; the other steps
    /// look at the same bytes either way, so both forms of a line get the same verdict.
    fn object_text<'l>(&self, line: RawLine<'l>) -> Result<&'l str, Rejection> {
        let bytes = line.as_bytes();
        if bytes.len() > self.schema.max_line_bytes {
            return Err(Rejection::line(RejectReason::LineTooLong));
        }
        if bytes
            .iter()
            .all(|&b| matches!(b, b' ' | b'\t' | b'\n' | b'\r'))
        {
            return Err(Rejection::line(RejectReason::EmptyLine));
        }
        let text = match line {
            RawLine::Text(text) => text,
            RawLine::Bytes(bytes) => match std::str::from_utf8(bytes) {
                Ok(text) => text,
                Err(_) => return Err(Rejection::line(RejectReason::InvalidUtf8)),
            },
        };

        // The emptiness check above guarantees a first non-whitespace byte. Any top level
        // other than an object is only skimmed for well-formedness: its strings and numbers
        // are never decoded, so e.g. a bare `1e400` is NotAnObject like any other number.
        if text
            .trim_start_matches([' ', '\t', '\n', '\r'])
            .as_bytes()
            .first()
            != Some(&b'{')
        {
            let reason = if is_well_formed_json(text) {
                RejectReason::NotAnObject
            } else {
                RejectReason::InvalidJson
            };
            return Err(Rejection::line(reason));
        }
        Ok(text)
    }

    /// Step 5: the fast path. `None` when the line is outside its subset of JSON (the line
    /// may still be valid); otherwise the verdict the serde path would give.
    ///
    /// The caller's `unit_hash` is called only once the scan is complete, with the canonical
    /// text the shared per-key logic handed to a recorder, and only if that logic accepted
    /// the unit id, which is exactly when the serde path calls it.
    fn parse_fast(
        &self,
        text: &str,
        unit_hash: &dyn Fn(&[u8]) -> u64,
    ) -> Option<Result<Event, Rejection>> {
        let recorded = UnitRecord::default();
        let record = |canonical: &[u8]| recorded.keep(canonical);
        let mut scan = LineScan::new(self, &record);
        FastLine { text, pos: 0 }.object(&mut scan).ok()?;
        let unit = scan.unit.map(|_| recorded.hash(unit_hash));
        let mut result = scan.finish();
        if let Ok(event) = &mut result {
            event.unit = unit;
        }
        Some(result)
    }

    /// [`LineParser::parse`] for a reader that feeds many lines of one layout: `shape`
    /// remembers the layout of the lines this reader has been seeing, and a line laid out
    /// the same way is read by the shape path (step 5 of the module documentation) without
    /// looking up its keys. The result is the same as `parse(line, unit_hash)` for any
    /// `shape` (see [`LineShape`]); only the speed depends on it.
    pub fn parse_with_shape(
        &self,
        line: &[u8],
        unit_hash: &dyn Fn(&[u8]) -> u64,
        shape: &mut LineShape,
    ) -> Result<Event, Rejection> {
        self.parse_raw_with_shape(RawLine::Bytes(line), unit_hash, shape)
    }

    /// [`LineParser::parse_with_shape`] of a [`RawLine`]: the same verdict for the line's
    /// bytes whichever form it comes in (a [`RawLine::Text`] only skips the UTF-8 check
    /// its reader has already made).
    pub fn parse_raw_with_shape(
        &self,
        line: RawLine<'_>,
        unit_hash: &dyn Fn(&[u8]) -> u64,
        shape: &mut LineShape,
    ) -> Result<Event, Rejection> {
        let text = self.object_text(line)?;
        if shape.is_learned() {
            if let Some(event) = self.parse_shape(text, shape, unit_hash) {
                shape.misses = 0;
                return Ok(event);
            }
            shape.misses = shape.misses.saturating_add(1);
        }
        let Some(result) = self.parse_fast(text, unit_hash) else {
            return self.parse_object_serde(text, unit_hash);
        };
        if result.is_ok() && (!shape.is_learned() || shape.misses >= RELEARN_AFTER_MISSES) {
            shape.learn(self, text);
        }
        result
    }

    /// The shape path (step 5): the line read along `shape`, or `None` when it does not
    /// follow it exactly or any field has a fault (the other paths then decide, from
    /// scratch).
    ///
    /// Why the event is the one [`LineParser::parse_fast`] would return: the shape was
    /// learned from a line the fast path accepted, so its gaps hold exactly the JSON
    /// whitespace, `{`, `,`, keys (without escapes) and `:` that the fast path's scanner
    /// read around the values of that line, each key a distinct schema field or a key
    /// outside the schema, and every schema field appears. A line whose bytes outside its
    /// values equal those gaps, with each value read by the same [`FastLine`] reader the
    /// fast path uses, therefore presents the same keys in the same order; its schema
    /// values go through the same [`ValueSeed::interpret`], its other values are only
    /// skipped as the fast path skips them, and no field repeats, so `LineScan::entry`
    /// would fill every slot with the same values and `LineScan::finish` would build the
    /// same event. The unit id is recorded and hashed only once the whole line has
    /// matched, as on the fast path.
    fn parse_shape(
        &self,
        text: &str,
        shape: &LineShape,
        unit_hash: &dyn Fn(&[u8]) -> u64,
    ) -> Option<Event> {
        let recorded = UnitRecord::default();
        let record = |canonical: &[u8]| recorded.keep(canonical);
        let bytes = text.as_bytes();
        let mut line = FastLine { text, pos: 0 };
        let mut time = None;
        let mut has_unit = false;
        let mut unit_text: Option<&str> = None;
        let mut categories = unseen_categories(self.schema.categories.len());
        let mut numbers = absent_numbers(self.schema.numbers.len());
        let mut gap_start = 0;
        for &(gap_end, slot) in &shape.fields {
            let gap = &shape.gaps[gap_start..gap_end];
            gap_start = gap_end;
            if !same_bytes(bytes.get(line.pos..line.pos + gap.len())?, gap) {
                return None;
            }
            line.pos += gap.len();
            let Some(slot) = slot else {
                line.skip().ok()?;
                continue;
            };
            // Numbers and categories are read by the reader their only acceptable type
            // takes, as `FastLine::interpret` would after its dispatch on the first byte;
            // any other first byte is a WrongType fault there, and a `None` here.
            match slot {
                Slot::Number(i) => {
                    if !matches!(line.peek(), Some(b'-' | b'0'..=b'9')) {
                        return None;
                    }
                    *numbers.get_mut(i)? =
                        number_value(line.number().ok()?.to_json().ok()?).ok()?;
                    continue;
                }
                Slot::Category(i) => {
                    if line.peek() != Some(b'"') {
                        return None;
                    }
                    *categories.get_mut(i)? = self.category_index(i, line.string().ok()?)?;
                    continue;
                }
                Slot::Time | Slot::Unit => {}
            }
            // A time or a unit id may be a string or an integer; a string goes straight to
            // the interpretation `FastLine::interpret` would hand it to. A unit id string is
            // its own canonical text, hashed from the line below instead of from a copy.
            let value = if line.peek() == Some(b'"') {
                let s = line.string().ok()?;
                if slot == Slot::Unit {
                    unit_text = Some(s);
                }
                let seed = ValueSeed {
                    parser: self,
                    unit_hash: &|_| 0,
                    slot,
                };
                seed.interpret(Json::Str(s))
            } else {
                let seed = ValueSeed {
                    parser: self,
                    unit_hash: &record,
                    slot,
                };
                line.interpret(seed).ok()?
            };
            match value.ok()? {
                FieldValue::Time(t) => time = Some(t),
                FieldValue::Unit(_) => has_unit = true,
                FieldValue::Category(_) | FieldValue::Number(_) => return None,
            }
        }
        if !same_bytes(bytes.get(line.pos..)?, &shape.gaps[gap_start..]) {
            return None;
        }
        // Every slot is filled when the shape came from an accepted line; checked anyway,
        // as `LineScan::finish` would.
        if has_unit != self.schema.unit_field.is_some()
            || categories.contains(&CATEGORY_UNSEEN)
            || numbers.iter().any(|x| x.is_nan())
        {
            return None;
        }
        let unit = has_unit.then(|| match unit_text {
            Some(text) => unit_hash(text.as_bytes()),
            None => recorded.hash(unit_hash),
        });
        Some(Event {
            time: time?,
            unit,
            categories,
            numbers,
        })
    }

    /// Step 6: the serde path on a line that passed steps 1 to 4.
    fn parse_object_serde(
        &self,
        text: &str,
        unit_hash: &dyn Fn(&[u8]) -> u64,
    ) -> Result<Event, Rejection> {
        let mut scan = LineScan::new(self, unit_hash);
        let mut de = serde_json::Deserializer::from_str(text);
        match (&mut scan).deserialize(&mut de).and_then(|()| de.end()) {
            Err(err) => Err(self.json_error_rejection(text, &err, scan.pending)),
            Ok(()) => scan.finish(),
        }
    }

    /// The schema field name of a slot, for [`Rejection::field`].
    fn field_name(&self, slot: Slot) -> Option<Arc<str>> {
        match slot {
            Slot::Time => Some(self.time_name.clone()),
            Slot::Unit => self.unit_name.clone(),
            Slot::Category(i) => self.category_names.get(i).cloned(),
            Slot::Number(i) => self.number_names.get(i).cloned(),
        }
    }

    /// The slot of a key (after JSON unescaping), if it is a schema field.
    fn slot_of_key(&self, key: &str) -> Option<Slot> {
        self.keys.get(key.as_bytes())
    }

    /// The domain index of a category value: an exact match on the unescaped value.
    fn category_index(&self, category: usize, value: &str) -> Option<u32> {
        self.domains.get(category)?.get(value.as_bytes())
    }

    /// Maps a serde_json error to a rejection.
    ///
    /// serde_json refuses a number literal whose value overflows `f64` (e.g. `1e400`) with a
    /// syntax-category error, although RFC 8259 §6 allows such literals. The task asks for
    /// `NumberOutOfRange` there, so this recognises it from evidence rather than from the
    /// error's message text: the error arose while a schema field's value was being read
    /// (`pending`), the bytes at the error position form a number literal directly after a
    /// `:` that matches RFC 8259's number grammar and whose value Rust's correctly rounded
    /// `f64` parser makes infinite, and the whole line is well-formed JSON once values are
    /// only skimmed ([`IgnoredAny`] does not convert numbers). Any other error, or a line
    /// that is also malformed elsewhere, is `InvalidJson`. The overflowing value maps to the
    /// slot's own reason: a time is a `BadTimestamp`, a unit id a `BadUnitId`, a category a
    /// `WrongType`.
    ///
    /// Lone UTF-16 surrogate escapes (`"\ud800"`) in a schema string field are not Unicode;
    /// serde_json refuses them, and they are `InvalidJson` here too.
    fn json_error_rejection(
        &self,
        text: &str,
        err: &serde_json::Error,
        pending: Option<Slot>,
    ) -> Rejection {
        if let Some(slot) = pending
            && err.classify() == serde_json::error::Category::Syntax
            && overflowing_number_at(text, err.line(), err.column())
            && is_well_formed_json(text)
        {
            let reason = match slot {
                Slot::Time => RejectReason::BadTimestamp,
                Slot::Unit => RejectReason::BadUnitId,
                Slot::Category(_) => RejectReason::WrongType,
                Slot::Number(_) => RejectReason::NumberOutOfRange,
            };
            return Rejection {
                reason,
                field: self.field_name(slot),
            };
        }
        Rejection::line(RejectReason::InvalidJson)
    }
}

/// Whether `text` is one well-formed JSON text, skimming values without converting them.
fn is_well_formed_json(text: &str) -> bool {
    let mut de = serde_json::Deserializer::from_str(text);
    de::Deserialize::deserialize(&mut de)
        .map(|IgnoredAny| ())
        .and_then(|()| de.end())
        .is_ok()
}

/// Whether the error position (serde_json's 1-based line and its column, which counts bytes
/// consumed on that line) lies on a JSON number literal that directly follows a `:` and
/// whose value overflows `f64`.
fn overflowing_number_at(text: &str, line: usize, column: usize) -> bool {
    let bytes = text.as_bytes();
    let Some(line_start) = nth_line_start(bytes, line) else {
        return false;
    };
    let offset = line_start.saturating_add(column).min(bytes.len());
    // serde_json stops either just past the literal or inside its exponent, so look both
    // ways for the maximal run of number characters.
    let is_number_byte =
        |b: &u8| b.is_ascii_digit() || matches!(b, b'-' | b'+' | b'.' | b'e' | b'E');
    let start = bytes
        .get(..offset)
        .and_then(|before| before.iter().rposition(|b| !is_number_byte(b)))
        .map_or(0, |i| i + 1);
    let end = bytes
        .get(offset..)
        .and_then(|after| after.iter().position(|b| !is_number_byte(b)))
        .map_or(bytes.len(), |i| offset + i);
    let Some(token) = text.get(start..end) else {
        return false;
    };
    let after_colon = bytes.get(..start).and_then(|before| {
        before
            .iter()
            .rev()
            .find(|b| !matches!(b, b' ' | b'\t' | b'\n' | b'\r'))
    }) == Some(&b':');
    after_colon
        && is_json_number(token.as_bytes())
        && token.parse::<f64>().is_ok_and(|v| v.is_infinite())
}

/// Byte offset where the 1-based `line` of `bytes` starts.
fn nth_line_start(bytes: &[u8], line: usize) -> Option<usize> {
    if line == 0 {
        return None;
    }
    if line == 1 {
        return Some(0);
    }
    bytes
        .iter()
        .enumerate()
        .filter(|(_, b)| **b == b'\n')
        .nth(line - 2)
        .map(|(i, _)| i + 1)
}

/// RFC 8259 §6: `-? (0 | [1-9][0-9]*) (\. [0-9]+)? ([eE] [+-]? [0-9]+)?`.
fn is_json_number(token: &[u8]) -> bool {
    fn digits(s: &[u8]) -> usize {
        s.iter().take_while(|b| b.is_ascii_digit()).count()
    }
    let mut rest = token.strip_prefix(b"-").unwrap_or(token);
    match rest.first() {
        Some(b'0') => rest = &rest[1..],
        Some(b'1'..=b'9') => rest = &rest[digits(rest)..],
        _ => return false,
    }
    if let Some(frac) = rest.strip_prefix(b".") {
        let n = digits(frac);
        if n == 0 {
            return false;
        }
        rest = &frac[n..];
    }
    if let Some(exp) = rest.strip_prefix(b"e").or_else(|| rest.strip_prefix(b"E")) {
        let exp = exp
            .strip_prefix(b"+")
            .or_else(|| exp.strip_prefix(b"-"))
            .unwrap_or(exp);
        let n = digits(exp);
        if n == 0 {
            return false;
        }
        rest = &exp[n..];
    }
    rest.is_empty()
}

/// A line's unit id as canonical text, kept by the fast and shape paths (through a
/// recording `unit_hash` they hand to the shared per-key logic) until the line is known to
/// be accepted: only then is the caller's hash called, once.
#[derive(Default)]
struct UnitRecord(RefCell<smallvec::SmallVec<[u8; MAX_UNIT_ID_BYTES]>>);

impl UnitRecord {
    /// Keeps `canonical`; the 0 stands in for the hash until [`UnitRecord::hash`].
    fn keep(&self, canonical: &[u8]) -> u64 {
        let mut buf = self.0.borrow_mut();
        buf.clear();
        buf.extend_from_slice(canonical);
        0
    }

    /// The caller's hash of the kept text.
    fn hash(&self, unit_hash: &dyn Fn(&[u8]) -> u64) -> u64 {
        unit_hash(&self.0.borrow())
    }
}

/// Consecutive lines that do not follow a learned [`LineShape`] after which the next line
/// the fast path accepts replaces it (a feed whose producer changed its layout).
const RELEARN_AFTER_MISSES: u32 = 16;

/// The layout of the lines one reader has been seeing, for
/// [`LineParser::parse_with_shape`]: the bytes of a line outside its values (its *gaps*:
/// whitespace, braces, commas, keys and colons) and the schema slot of each value. A feed
/// written by one producer lays out every line the same way, so matching the gaps byte for
/// byte replaces reading each key and looking it up (issue 9).
///
/// Learned from the first line the fast path accepts, and again when
/// 16 lines in a row (`RELEARN_AFTER_MISSES`) have not followed it. It holds no values, no
/// unit ids and nothing from rejected lines: only key names and separators, and its `Debug`
/// output shows neither (a key outside the schema is still line content). Results never
/// depend on it, only the speed: a line that does not follow it exactly is read as if there
/// were none.
#[derive(Clone, Default)]
pub struct LineShape {
    /// Every gap, concatenated: before the first value, between values, after the last.
    gaps: Vec<u8>,
    /// Per value in line order: the end of the gap before it in `gaps`, and its slot
    /// (`None` for a key outside the schema). The final gap runs from the last end to the
    /// end of `gaps`.
    fields: Vec<(usize, Option<Slot>)>,
    /// Lines since the last that followed the shape.
    misses: u32,
}

impl fmt::Debug for LineShape {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("LineShape")
            .field("fields", &self.fields.len())
            .field("gap_bytes", &self.gaps.len())
            .field("misses", &self.misses)
            .finish()
    }
}

impl LineShape {
    /// A shape that has learned nothing yet.
    pub fn new() -> LineShape {
        LineShape::default()
    }

    fn is_learned(&self) -> bool {
        !self.fields.is_empty()
    }

    /// Learns the layout of `text`, a line the fast path accepted. The walk repeats the fast
    /// path's scanner ([`FastLine::object`]), recording where values start and end; if it
    /// fails (it cannot on an accepted line) the shape is left as it was.
    fn learn(&mut self, parser: &LineParser, text: &str) {
        let mut line = FastLine { text, pos: 0 };
        let mut fields = Vec::new();
        let mut gaps = Vec::new();
        let mut gap_start = 0;
        let walked = (|| -> Result<(), GiveUp> {
            line.skip_whitespace();
            line.eat(b'{')?;
            loop {
                line.skip_whitespace();
                let key = line.string()?;
                line.skip_whitespace();
                line.eat(b':')?;
                line.skip_whitespace();
                gaps.extend_from_slice(&text.as_bytes()[gap_start..line.pos]);
                fields.push((gaps.len(), parser.slot_of_key(key)));
                line.skip()?;
                gap_start = line.pos;
                line.skip_whitespace();
                match line.peek() {
                    Some(b',') => line.pos += 1,
                    Some(b'}') => {
                        line.pos += 1;
                        break;
                    }
                    _ => return Err(GiveUp),
                }
            }
            line.skip_whitespace();
            if line.pos == text.len() {
                Ok(())
            } else {
                Err(GiveUp)
            }
        })();
        let repeats = fields.iter().enumerate().any(|(i, &(_, slot))| {
            slot.is_some() && fields[..i].iter().any(|&(_, earlier)| earlier == slot)
        });
        if walked.is_err() || repeats {
            return;
        }
        gaps.extend_from_slice(&text.as_bytes()[gap_start..]);
        *self = LineShape {
            gaps,
            fields,
            misses: 0,
        };
    }
}

/// The fast path met something outside its subset of JSON; the serde path decides.
#[derive(Debug, PartialEq, Eq)]
struct GiveUp;

/// Bytes that end the fast scan of a string: the closing quote, and the backslash and raw
/// control characters (U+0000..U+001F, RFC 8259 §7) it leaves to serde_json.
const STRING_STOP: [bool; 256] = {
    let mut table = [false; 256];
    let mut b = 0;
    while b < 0x20 {
        table[b] = true;
        b += 1;
    }
    table[b'"' as usize] = true;
    table[b'\\' as usize] = true;
    table
};

/// `0x01` in every byte of a word.
pub(crate) const SWAR_ONES: u64 = 0x0101_0101_0101_0101;
/// `0x80` in every byte of a word.
const SWAR_HIGHS: u64 = 0x8080_8080_8080_8080;

/// Marks, in bit 7 of each byte, the zero bytes of `x` (Mycroft's test: the borrow of a
/// per-byte subtraction). A false mark can only sit above a true one, so the lowest mark is
/// exact. OR several such masks to search for several byte classes at once.
#[inline(always)]
pub(crate) fn swar_zero_bytes(x: u64) -> u64 {
    x.wrapping_sub(SWAR_ONES) & !x
}

/// The position of the first byte that `word_marks` marks (see [`swar_zero_bytes`]) in
/// `bytes`, eight bytes at a time, with `is_stop` the same test for one byte for the last
/// few bytes.
#[inline(always)]
pub(crate) fn swar_position(
    bytes: &[u8],
    word_marks: impl Fn(u64) -> u64,
    is_stop: impl Fn(u8) -> bool,
) -> Option<usize> {
    let (words, tail) = bytes.as_chunks::<8>();
    for (i, word) in words.iter().enumerate() {
        let marks = word_marks(u64::from_le_bytes(*word)) & SWAR_HIGHS;
        if marks != 0 {
            return Some(8 * i + (marks.trailing_zeros() / 8) as usize);
        }
    }
    let at = tail.iter().position(|&b| is_stop(b))?;
    Some(8 * words.len() + at)
}

/// The position of the first [`STRING_STOP`] byte: a quote, a backslash or a control byte
/// (below 0x20, found as a borrow of subtracting 0x20 from a byte without its top bit).
#[inline]
fn string_stop(bytes: &[u8]) -> Option<usize> {
    swar_position(
        bytes,
        |w| {
            swar_zero_bytes(w ^ (SWAR_ONES * u64::from(b'"')))
                | swar_zero_bytes(w ^ (SWAR_ONES * u64::from(b'\\')))
                | (w.wrapping_sub(SWAR_ONES * 0x20) & !w)
        },
        |b| STRING_STOP[usize::from(b)],
    )
}

/// 10^0 ..= 10^22, each exact in binary64 (5^22 < 2^53), for Clinger's fast path.
const POW10: [f64; 23] = [
    1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11, 1e12, 1e13, 1e14, 1e15, 1e16,
    1e17, 1e18, 1e19, 1e20, 1e21, 1e22,
];

/// Most digits (integer and fraction parts together) of a float the fast path converts:
/// 19 digits always fit `u64`, so serde_json stays on its short-significand path too.
const FAST_FLOAT_DIGITS: u32 = 19;
/// Most exponent digits of a float the fast path converts (the exponent fits `i32`).
const FAST_EXPONENT_DIGITS: u32 = 9;

/// A number literal the fast path has checked against RFC 8259 §6, not yet converted
/// (values that are only skipped are never converted, as with serde_json's `IgnoredAny`).
struct FastNumber<'a> {
    /// The literal, sign included.
    text: &'a str,
    negative: bool,
    /// The digits of the integer and fraction parts as one integer (exact unless
    /// `overflow`).
    significand: u64,
    /// The significand does not fit `u64`.
    overflow: bool,
    /// Digits in the integer and fraction parts.
    digits: u32,
    /// Digits in the fraction part.
    fraction_digits: u32,
    /// The exponent's value (saturating) and its number of digits; `None` without one.
    exponent: Option<(i64, u32)>,
}

impl<'a> FastNumber<'a> {
    /// The value serde_json's `deserialize_any` hands to a visitor for this literal (serde_json
    /// 1.0.154, `de.rs`, `parse_integer`, `parse_number`, `f64_from_parts`), or [`GiveUp`]
    /// where the fast path does not follow serde_json (integers beyond `u64`, long floats,
    /// floats that overflow, which serde_json turns into an error).
    fn to_json(&self) -> Result<Json<'a>, GiveUp> {
        if self.fraction_digits == 0 && self.exponent.is_none() {
            if self.overflow {
                return Err(GiveUp);
            }
            if !self.negative {
                return Ok(Json::U64(self.significand));
            }
            // serde_json's own rule, verbatim: a wrapping negation; `-0` and magnitudes
            // above 2^63 become the f64 of the negated magnitude (`-0` is `-0.0`).
            let negated = (self.significand as i64).wrapping_neg();
            return Ok(if negated >= 0 {
                Json::F64(-(self.significand as f64))
            } else {
                Json::I64(negated)
            });
        }
        if self.digits > FAST_FLOAT_DIGITS {
            return Err(GiveUp);
        }
        let exponent = match self.exponent {
            Some((_, n)) if n > FAST_EXPONENT_DIGITS => return Err(GiveUp),
            Some((e, _)) => e,
            None => 0,
        };
        let power = exponent - i64::from(self.fraction_digits);
        let exact_power = POW10.get(usize::try_from(power.unsigned_abs()).unwrap_or(usize::MAX));
        let value = match exact_power {
            // Clinger's fast path: an exact significand and an exact power of ten, so the one
            // multiplication or division is correctly rounded (IEEE 754 §4.3).
            Some(&scale) if self.significand <= 1 << 53 => {
                let magnitude = if power < 0 {
                    self.significand as f64 / scale
                } else {
                    self.significand as f64 * scale
                };
                if self.negative { -magnitude } else { magnitude }
            }
            // std's parser is correctly rounded too (and keeps the sign of a zero).
            _ => self.text.parse::<f64>().map_err(|_| GiveUp)?,
        };
        if value.is_infinite() {
            return Err(GiveUp);
        }
        Ok(Json::F64(value))
    }
}

/// A value as the fast path reads it.
enum FastValue<'a> {
    Str(&'a str),
    Number(FastNumber<'a>),
    /// `true`, `false` or `null`.
    Literal,
}

/// The fast path's scanner: a position in a line that passed steps 1 to 4 (module
/// documentation). Every method reads one token or gives up; none looks back.
struct FastLine<'a> {
    text: &'a str,
    pos: usize,
}

impl<'a> FastLine<'a> {
    #[inline]
    fn peek(&self) -> Option<u8> {
        self.text.as_bytes().get(self.pos).copied()
    }

    /// Skips JSON whitespace (RFC 8259 §2: space, tab, LF, CR).
    #[inline]
    fn skip_whitespace(&mut self) {
        while let Some(b' ' | b'\t' | b'\n' | b'\r') = self.peek() {
            self.pos += 1;
        }
    }

    /// Reads `byte`.
    #[inline]
    fn eat(&mut self, byte: u8) -> Result<(), GiveUp> {
        if self.peek() == Some(byte) {
            self.pos += 1;
            Ok(())
        } else {
            Err(GiveUp)
        }
    }

    /// Reads the whole line: one flat object and nothing but whitespace after it, feeding
    /// every key and value to `scan` in line order.
    fn object(&mut self, scan: &mut LineScan<'_>) -> Result<(), GiveUp> {
        self.skip_whitespace();
        self.eat(b'{')?;
        self.skip_whitespace();
        if self.peek() == Some(b'}') {
            self.pos += 1;
        } else {
            loop {
                let key = self.string()?;
                self.skip_whitespace();
                self.eat(b':')?;
                self.skip_whitespace();
                scan.entry(scan.parser.slot_of_key(key), self)?;
                self.skip_whitespace();
                match self.peek() {
                    Some(b',') => {
                        self.pos += 1;
                        self.skip_whitespace();
                    }
                    Some(b'}') => {
                        self.pos += 1;
                        break;
                    }
                    _ => return Err(GiveUp),
                }
            }
        }
        self.skip_whitespace();
        if self.pos == self.text.len() {
            Ok(())
        } else {
            Err(GiveUp)
        }
    }

    /// A string without escapes or control characters (RFC 8259 §7); the text between the
    /// quotes is valid UTF-8 because the line is and the quotes are ASCII.
    #[inline]
    fn string(&mut self) -> Result<&'a str, GiveUp> {
        self.eat(b'"')?;
        let start = self.pos;
        let rest = self.text.as_bytes().get(start..).ok_or(GiveUp)?;
        let len = string_stop(rest).ok_or(GiveUp)?;
        if rest.get(len) != Some(&b'"') {
            return Err(GiveUp);
        }
        self.pos = start + len + 1;
        self.text.get(start..start + len).ok_or(GiveUp)
    }

    /// Reads a run of ASCII digits into `significand` (exact while it fits `u64`).
    #[inline]
    fn digits(&mut self, significand: &mut u64, overflow: &mut bool) -> u32 {
        let mut n = 0;
        while let Some(b @ b'0'..=b'9') = self.peek() {
            self.pos += 1;
            n += 1;
            match significand
                .checked_mul(10)
                .and_then(|s| s.checked_add(u64::from(b - b'0')))
            {
                Some(s) => *significand = s,
                None => *overflow = true,
            }
        }
        n
    }

    /// A number literal, exactly RFC 8259 §6:
    /// `-? (0 | [1-9][0-9]*) (\. [0-9]+)? ([eE] [+-]? [0-9]+)?`. A leading zero followed by
    /// a digit ends the literal at the zero; the caller then gives up on the digit.
    fn number(&mut self) -> Result<FastNumber<'a>, GiveUp> {
        let start = self.pos;
        let negative = self.peek() == Some(b'-');
        if negative {
            self.pos += 1;
        }
        let (mut significand, mut overflow) = (0u64, false);
        let integer_digits = match self.peek() {
            Some(b'0') => {
                self.pos += 1;
                1
            }
            Some(b'1'..=b'9') => self.digits(&mut significand, &mut overflow),
            _ => return Err(GiveUp),
        };
        let mut fraction_digits = 0;
        if self.peek() == Some(b'.') {
            self.pos += 1;
            fraction_digits = self.digits(&mut significand, &mut overflow);
            if fraction_digits == 0 {
                return Err(GiveUp);
            }
        }
        let mut exponent = None;
        if let Some(b'e' | b'E') = self.peek() {
            self.pos += 1;
            let negative_exponent = match self.peek() {
                Some(b'-') => {
                    self.pos += 1;
                    true
                }
                Some(b'+') => {
                    self.pos += 1;
                    false
                }
                _ => false,
            };
            let (mut value, mut value_overflow) = (0u64, false);
            let n = self.digits(&mut value, &mut value_overflow);
            if n == 0 {
                return Err(GiveUp);
            }
            let value = if value_overflow {
                i64::MAX
            } else {
                i64::try_from(value).unwrap_or(i64::MAX)
            };
            exponent = Some((if negative_exponent { -value } else { value }, n));
        }
        Ok(FastNumber {
            text: self.text.get(start..self.pos).ok_or(GiveUp)?,
            negative,
            significand,
            overflow,
            digits: integer_digits + fraction_digits,
            fraction_digits,
            exponent,
        })
    }

    /// `true`, `false` or `null`.
    fn literal(&mut self) -> Result<FastValue<'a>, GiveUp> {
        let rest = self.text.as_bytes().get(self.pos..).ok_or(GiveUp)?;
        let len = [&b"true"[..], b"false", b"null"]
            .into_iter()
            .find(|word| rest.starts_with(word))
            .ok_or(GiveUp)?
            .len();
        self.pos += len;
        Ok(FastValue::Literal)
    }

    /// Any value of the subset: a string, a number or a literal (arrays and objects give up).
    #[inline]
    fn value(&mut self) -> Result<FastValue<'a>, GiveUp> {
        match self.peek() {
            Some(b'"') => self.string().map(FastValue::Str),
            Some(b'-' | b'0'..=b'9') => self.number().map(FastValue::Number),
            Some(b't' | b'f' | b'n') => self.literal(),
            _ => Err(GiveUp),
        }
    }
}

impl ValueSource for FastLine<'_> {
    type Error = GiveUp;

    fn skip(&mut self) -> Result<(), GiveUp> {
        self.value().map(|_| ())
    }

    fn interpret(
        &mut self,
        seed: ValueSeed<'_>,
    ) -> Result<Result<FieldValue, RejectReason>, GiveUp> {
        let json = match self.value()? {
            FastValue::Str(s) => Json::Str(s),
            FastValue::Number(n) => n.to_json()?,
            FastValue::Literal => Json::Other,
        };
        Ok(seed.interpret(json))
    }
}

/// The state of one line's parse: what has been filled and the first fault seen.
struct LineScan<'p> {
    parser: &'p LineParser,
    unit_hash: &'p dyn Fn(&[u8]) -> u64,
    time: Option<Millis>,
    unit: Option<u64>,
    /// [`CATEGORY_UNSEEN`] until the field is read.
    categories: Categories,
    /// NaN until the field is read (an accepted number is finite, so NaN is never a value).
    numbers: Numbers,
    /// The first semantic fault in line order, with its slot.
    fault: Option<(RejectReason, Slot)>,
    /// The slot whose value serde_json is reading right now; left set if reading it failed.
    pending: Option<Slot>,
}

/// A schema field's value after interpretation.
enum FieldValue {
    Time(Millis),
    Unit(u64),
    Category(u32),
    Number(f64),
}

impl<'p> LineScan<'p> {
    fn new(parser: &'p LineParser, unit_hash: &'p dyn Fn(&[u8]) -> u64) -> LineScan<'p> {
        LineScan {
            parser,
            unit_hash,
            time: None,
            unit: None,
            categories: unseen_categories(parser.schema.categories.len()),
            numbers: absent_numbers(parser.schema.numbers.len()),
            fault: None,
            pending: None,
        }
    }

    fn is_filled(&self, slot: Slot) -> bool {
        match slot {
            Slot::Time => self.time.is_some(),
            Slot::Unit => self.unit.is_some(),
            Slot::Category(i) => self
                .categories
                .get(i)
                .is_some_and(|&c| c != CATEGORY_UNSEEN),
            Slot::Number(i) => self.numbers.get(i).is_some_and(|x| !x.is_nan()),
        }
    }

    fn fill(&mut self, value: FieldValue, slot: Slot) {
        match (slot, value) {
            (Slot::Time, FieldValue::Time(t)) => self.time = Some(t),
            (Slot::Unit, FieldValue::Unit(u)) => self.unit = Some(u),
            (Slot::Category(i), FieldValue::Category(c)) => {
                if let Some(entry) = self.categories.get_mut(i) {
                    *entry = c;
                }
            }
            (Slot::Number(i), FieldValue::Number(x)) => {
                if let Some(entry) = self.numbers.get_mut(i) {
                    *entry = x;
                }
            }
            // ValueSeed builds the variant that matches its slot; nothing else reaches here.
            _ => {}
        }
    }

    /// The per-key logic both paths share: `slot` is the schema slot of the key just read
    /// (`None` for a key outside the schema), `values` yields that key's value.
    ///
    /// An unknown key, any key after the first fault, and a second occurrence of a schema
    /// field (which becomes the fault, DuplicateField) have their value only read for
    /// syntax; otherwise the value is interpreted for its slot and fills it or becomes the
    /// fault.
    #[inline]
    fn entry<S: ValueSource>(
        &mut self,
        slot: Option<Slot>,
        values: &mut S,
    ) -> Result<(), S::Error> {
        let Some(slot) = slot else {
            return values.skip();
        };
        if self.fault.is_some() {
            // Only syntax matters after the first fault.
            return values.skip();
        }
        if self.is_filled(slot) {
            self.fault = Some((RejectReason::DuplicateField, slot));
            return values.skip();
        }
        self.pending = Some(slot);
        let value = values.interpret(ValueSeed {
            parser: self.parser,
            unit_hash: self.unit_hash,
            slot,
        })?;
        self.pending = None;
        match value {
            Ok(value) => self.fill(value, slot),
            Err(reason) => self.fault = Some((reason, slot)),
        }
        Ok(())
    }

    /// The event, or the first fault, or the first missing field in schema order.
    fn finish(self) -> Result<Event, Rejection> {
        let parser = self.parser;
        let reject = |reason, slot| {
            Err(Rejection {
                reason,
                field: parser.field_name(slot),
            })
        };
        if let Some((reason, slot)) = self.fault {
            return reject(reason, slot);
        }
        let Some(time) = self.time else {
            return reject(RejectReason::MissingField, Slot::Time);
        };
        if parser.schema.unit_field.is_some() && self.unit.is_none() {
            return reject(RejectReason::MissingField, Slot::Unit);
        }
        if let Some(i) = self.categories.iter().position(|&c| c == CATEGORY_UNSEEN) {
            return reject(RejectReason::MissingField, Slot::Category(i));
        }
        if let Some(i) = self.numbers.iter().position(|x| x.is_nan()) {
            return reject(RejectReason::MissingField, Slot::Number(i));
        }
        Ok(Event {
            time,
            unit: self.unit,
            categories: self.categories,
            numbers: self.numbers,
        })
    }
}

impl<'de> DeserializeSeed<'de> for &mut LineScan<'_> {
    type Value = ();

    fn deserialize<D: de::Deserializer<'de>>(self, deserializer: D) -> Result<(), D::Error> {
        deserializer.deserialize_map(TopLevel(self))
    }
}

/// Visits the top-level object of a line.
struct TopLevel<'s, 'p>(&'s mut LineScan<'p>);

impl<'de> Visitor<'de> for TopLevel<'_, '_> {
    type Value = ();

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("a json object")
    }

    fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<(), A::Error> {
        let scan = self.0;
        let parser = scan.parser;
        while let Some(slot) = map.next_key_seed(KeySeed(parser))? {
            scan.entry(slot, &mut MapValues(&mut map, std::marker::PhantomData))?;
        }
        Ok(())
    }
}

/// Where [`LineScan::entry`] reads the value of the key just read: serde_json's map
/// ([`MapValues`]) or the fast path's scanner ([`FastLine`]).
trait ValueSource {
    /// Why the value could not be read (serde_json's error; the fast path's [`GiveUp`]).
    type Error;
    /// Reads the value for syntax only (numbers are not converted).
    fn skip(&mut self) -> Result<(), Self::Error>;
    /// Reads the value and interprets it for the seed's slot.
    fn interpret(
        &mut self,
        seed: ValueSeed<'_>,
    ) -> Result<Result<FieldValue, RejectReason>, Self::Error>;
}

/// The serde path's values: the next value of serde_json's map.
struct MapValues<'m, 'de, A>(&'m mut A, std::marker::PhantomData<&'de ()>);

impl<'de, A: MapAccess<'de>> ValueSource for MapValues<'_, 'de, A> {
    type Error = A::Error;

    fn skip(&mut self) -> Result<(), A::Error> {
        self.0.next_value::<IgnoredAny>().map(|IgnoredAny| ())
    }

    fn interpret(
        &mut self,
        seed: ValueSeed<'_>,
    ) -> Result<Result<FieldValue, RejectReason>, A::Error> {
        self.0.next_value_seed(seed)
    }
}

/// Reads an object key and looks it up among the schema fields without copying it.
struct KeySeed<'p>(&'p LineParser);

impl<'de> DeserializeSeed<'de> for KeySeed<'_> {
    type Value = Option<Slot>;

    fn deserialize<D: de::Deserializer<'de>>(
        self,
        deserializer: D,
    ) -> Result<Self::Value, D::Error> {
        deserializer.deserialize_str(self)
    }
}

impl<'de> Visitor<'de> for KeySeed<'_> {
    type Value = Option<Slot>;

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("a string key")
    }

    fn visit_str<E: de::Error>(self, key: &str) -> Result<Option<Slot>, E> {
        Ok(self.0.slot_of_key(key))
    }
}

/// A JSON value as the field interpreters see it; strings are borrowed for the call only.
enum Json<'a> {
    Str(&'a str),
    U64(u64),
    I64(i64),
    F64(f64),
    /// `true`, `false`, `null`, an array or an object: wrong for every field.
    Other,
}

/// Reads one schema field's value and interprets it for its slot. The outer `Result` is
/// serde_json's (syntax); the inner one the field's verdict.
struct ValueSeed<'p> {
    parser: &'p LineParser,
    unit_hash: &'p dyn Fn(&[u8]) -> u64,
    slot: Slot,
}

impl ValueSeed<'_> {
    fn interpret(&self, value: Json<'_>) -> Result<FieldValue, RejectReason> {
        match self.slot {
            Slot::Time => time_value(value).map(FieldValue::Time),
            Slot::Unit => self.unit_value(value).map(FieldValue::Unit),
            Slot::Category(i) => match value {
                Json::Str(s) => self
                    .parser
                    .category_index(i, s)
                    .map(FieldValue::Category)
                    .ok_or(RejectReason::UnknownCategory),
                _ => Err(RejectReason::WrongType),
            },
            Slot::Number(_) => number_value(value).map(FieldValue::Number),
        }
    }

    /// Hashes the unit id's canonical text: the unescaped string, or the integer in decimal
    /// with a leading `-` when negative. serde_json hands over any JSON integer that fits
    /// `u64` or `i64` as such; larger integers, fractions, exponents and `-0` arrive as `f64`
    /// and are refused because their decimal text is not recoverable exactly.
    fn unit_value(&self, value: Json<'_>) -> Result<u64, RejectReason> {
        let mut digits = [0u8; 21];
        let canonical: &[u8] = match value {
            Json::Str(s) if !s.is_empty() && s.len() <= MAX_UNIT_ID_BYTES => s.as_bytes(),
            Json::U64(v) => decimal_text(&mut digits, false, v),
            Json::I64(v) => decimal_text(&mut digits, v < 0, v.unsigned_abs()),
            _ => return Err(RejectReason::BadUnitId),
        };
        Ok((self.unit_hash)(canonical))
    }
}

/// An RFC 3339 string or a JSON integer of epoch milliseconds, within the accepted range.
/// Every other JSON type (and a float, even `1.7e12`) is a BadTimestamp, not a WrongType:
/// the time field has its own reason so operators see clock problems apart.
fn time_value(value: Json<'_>) -> Result<Millis, RejectReason> {
    let time = match value {
        Json::Str(s) => Millis::parse_rfc3339(s),
        Json::U64(v) => i64::try_from(v).ok().map(Millis),
        Json::I64(v) => Some(Millis(v)),
        Json::F64(_) | Json::Other => None,
    };
    time.filter(|t| (MIN_EVENT_TIME..=MAX_EVENT_TIME).contains(t))
        .ok_or(RejectReason::BadTimestamp)
}

/// A JSON number, finite, with magnitude at most [`MAX_ABS_NUMBER`]. Integers are compared
/// as integers so the bound is exact; the accepted ones convert to `f64` exactly.
fn number_value(value: Json<'_>) -> Result<f64, RejectReason> {
    match value {
        Json::U64(v) if v <= MAX_ABS_INTEGER => Ok(v as f64),
        Json::I64(v) if v.unsigned_abs() <= MAX_ABS_INTEGER => Ok(v as f64),
        Json::F64(v) if v.is_finite() && v.abs() <= MAX_ABS_NUMBER => Ok(v),
        Json::U64(_) | Json::I64(_) | Json::F64(_) => Err(RejectReason::NumberOutOfRange),
        Json::Str(_) | Json::Other => Err(RejectReason::WrongType),
    }
}

/// Writes `magnitude` in decimal (with `-` if `negative`) at the end of `buf` and returns
/// the written part. Twenty-one bytes always suffice: u64::MAX has 20 digits, plus the sign.
fn decimal_text(buf: &mut [u8; 21], negative: bool, magnitude: u64) -> &[u8] {
    let mut start = buf.len();
    let mut rest = magnitude;
    loop {
        start -= 1;
        // `rest % 10` is below 10, so the cast cannot truncate.
        buf[start] = b'0' + (rest % 10) as u8;
        rest /= 10;
        if rest == 0 {
            break;
        }
    }
    if negative {
        start -= 1;
        buf[start] = b'-';
    }
    &buf[start..]
}

impl<'de> DeserializeSeed<'de> for ValueSeed<'_> {
    type Value = Result<FieldValue, RejectReason>;

    fn deserialize<D: de::Deserializer<'de>>(
        self,
        deserializer: D,
    ) -> Result<Self::Value, D::Error> {
        deserializer.deserialize_any(self)
    }
}

impl<'de> Visitor<'de> for ValueSeed<'_> {
    type Value = Result<FieldValue, RejectReason>;

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("any json value")
    }

    fn visit_bool<E: de::Error>(self, _: bool) -> Result<Self::Value, E> {
        Ok(self.interpret(Json::Other))
    }

    fn visit_i64<E: de::Error>(self, v: i64) -> Result<Self::Value, E> {
        Ok(self.interpret(Json::I64(v)))
    }

    fn visit_u64<E: de::Error>(self, v: u64) -> Result<Self::Value, E> {
        Ok(self.interpret(Json::U64(v)))
    }

    fn visit_f64<E: de::Error>(self, v: f64) -> Result<Self::Value, E> {
        Ok(self.interpret(Json::F64(v)))
    }

    fn visit_str<E: de::Error>(self, v: &str) -> Result<Self::Value, E> {
        Ok(self.interpret(Json::Str(v)))
    }

    fn visit_unit<E: de::Error>(self) -> Result<Self::Value, E> {
        Ok(self.interpret(Json::Other))
    }

    fn visit_none<E: de::Error>(self) -> Result<Self::Value, E> {
        Ok(self.interpret(Json::Other))
    }

    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Self::Value, A::Error> {
        while seq.next_element::<IgnoredAny>()?.is_some() {}
        Ok(self.interpret(Json::Other))
    }

    fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Self::Value, A::Error> {
        while map.next_entry::<IgnoredAny, IgnoredAny>()?.is_some() {}
        Ok(self.interpret(Json::Other))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// The demo schema of scenario.md; the line limit is the contract's example value.
    fn demo_schema() -> Schema {
        let strings = |xs: &[&str]| xs.iter().map(|x| x.to_string()).collect::<Vec<_>>();
        Schema {
            time_field: "ts".into(),
            unit_field: Some("card".into()),
            categories: vec![
                (
                    "zone".into(),
                    strings(&[
                        "harbour",
                        "old-town",
                        "uplands",
                        "riverside",
                        "airport-link",
                    ]),
                ),
                ("mode".into(), strings(&["tram", "ferry", "bus"])),
            ],
            numbers: strings(&["fare_cents", "trip_km", "trip_minutes", "transfers"]),
            max_line_bytes: 65536,
        }
    }

    fn demo_parser() -> LineParser {
        LineParser::new(demo_schema()).expect("the demo schema is valid")
    }

    /// Stand-in for the engine's keyed hash: the first 8 bytes of BLAKE3.
    fn test_hash(bytes: &[u8]) -> u64 {
        let digest = blake3::hash(bytes);
        let mut first = [0u8; 8];
        first.copy_from_slice(&digest.as_bytes()[..8]);
        u64::from_le_bytes(first)
    }

    /// The event of scenario.md, verbatim.
    const SCENARIO_LINE: &str = r#"{"ts":"2026-03-02T08:14:07Z","card":"c-7f3a91","mode":"tram","zone":"harbour","fare_cents":240,"trip_km":3.8,"trip_minutes":14.5,"transfers":0}"#;

    /// 2026-03-02T08:14:07Z in epoch milliseconds (`date -u -d 2026-03-02T08:14:07Z +%s`
    /// prints 1772439247).
    const SCENARIO_MS: i64 = 1_772_439_247_000;

    /// The scenario line with one field's raw JSON value replaced (or the field removed when
    /// `raw` is `None`).
    fn with_field(field: &str, raw: Option<&str>) -> String {
        let mut fields = vec![
            ("ts", r#""2026-03-02T08:14:07Z""#),
            ("card", r#""c-7f3a91""#),
            ("mode", r#""tram""#),
            ("zone", r#""harbour""#),
            ("fare_cents", "240"),
            ("trip_km", "3.8"),
            ("trip_minutes", "14.5"),
            ("transfers", "0"),
        ];
        match raw {
            Some(raw) => {
                for entry in &mut fields {
                    if entry.0 == field {
                        entry.1 = raw;
                    }
                }
            }
            None => fields.retain(|entry| entry.0 != field),
        }
        let body: Vec<String> = fields.iter().map(|(k, v)| format!("\"{k}\":{v}")).collect();
        format!("{{{}}}", body.join(","))
    }

    fn parse(line: &[u8]) -> Result<Event, Rejection> {
        demo_parser().parse(line, &test_hash)
    }

    /// Asserts the rejection of `line` by the demo parser.
    #[track_caller]
    fn check(line: &[u8], reason: RejectReason, field: Option<&str>) {
        match parse(line) {
            Ok(event) => panic!("accepted {:?} as {event:?}", String::from_utf8_lossy(line)),
            Err(rejection) => {
                assert_eq!(
                    (rejection.reason, rejection.field.as_deref()),
                    (reason, field),
                    "line {:?}",
                    String::from_utf8_lossy(line)
                );
            }
        }
    }

    #[test]
    fn scenario_event_is_accepted_with_its_values() {
        let event = parse(SCENARIO_LINE.as_bytes()).expect("scenario line is valid");
        assert_eq!(event.time, Millis(SCENARIO_MS));
        assert_eq!(event.unit, Some(test_hash(b"c-7f3a91")));
        // zone "harbour" is index 0 of its list, mode "tram" index 0 of its list.
        assert_eq!(event.categories.as_slice(), [0, 0]);
        assert_eq!(event.numbers.as_slice(), [240.0, 3.8, 14.5, 0.0]);
        // Key order does not matter; unknown keys are skipped whatever their shape.
        let reordered = r#"{"transfers":2,"x":{"a":[1,{"b":null}]},"zone":"airport-link","trip_minutes":1e1,"mode":"bus","fare_cents":-5,"trip_km":0.5,"card":"z","ts":0}"#;
        let event = parse(reordered.as_bytes()).expect("valid");
        assert_eq!(event.time, MIN_EVENT_TIME);
        assert_eq!(event.categories.as_slice(), [4, 2]);
        assert_eq!(event.numbers.as_slice(), [-5.0, 0.5, 10.0, 2.0]);
    }

    #[test]
    fn time_accepts_rfc3339_and_integer_millis_in_range() {
        let at = |raw: &str| parse(with_field("ts", Some(raw)).as_bytes()).map(|e| e.time);
        assert_eq!(at(&SCENARIO_MS.to_string()), Ok(Millis(SCENARIO_MS)));
        // RFC 3339 §5.6 offsets: 09:14:07.25+01:00 is 08:14:07.25Z.
        assert_eq!(
            at(r#""2026-03-02T09:14:07.25+01:00""#),
            Ok(Millis(SCENARIO_MS + 250))
        );
        assert_eq!(at("0"), Ok(MIN_EVENT_TIME));
        assert_eq!(at(&MAX_EVENT_TIME.0.to_string()), Ok(MAX_EVENT_TIME));
        let bad_timestamp = Err(Rejection {
            reason: RejectReason::BadTimestamp,
            field: Some(Arc::from("ts")),
        });
        for raw in [
            "-1",
            &(MAX_EVENT_TIME.0 + 1).to_string(),
            "18446744073709551615",
            "1772439247000.0",
            "1.772439247e12",
            "-0",
            "1e400",
            r#""2026-03-02 08:14:07""#,
            r#""2026-13-02T08:14:07Z""#,
            r#""1772439247000""#,
            r#""""#,
            "null",
            "true",
            "[1772439247000]",
            r#"{"ms":1772439247000}"#,
        ] {
            assert_eq!(at(raw), bad_timestamp, "ts = {raw}");
        }
    }

    #[test]
    fn unit_id_is_hashed_from_its_canonical_text() {
        let seen = RefCell::new(Vec::<Vec<u8>>::new());
        let recorder = |bytes: &[u8]| {
            seen.borrow_mut().push(bytes.to_vec());
            7
        };
        let parser = demo_parser();
        // The scenario line with `card` set to `raw`, through the fast path or the shape
        // path (the line has the scenario's layout), with a fresh record of hash calls.
        let parse_card = |raw: &str, shaped: bool| {
            let line = with_field("card", Some(raw));
            seen.borrow_mut().clear();
            if shaped {
                parser.parse_with_shape(line.as_bytes(), &recorder, &mut scenario_shape(&parser))
            } else {
                parser.parse(line.as_bytes(), &recorder)
            }
        };
        let long = format!("\"{}\"", "é".repeat(128)); // 256 bytes of UTF-8
        for (raw, canonical) in [
            (r#""c-7f3a91""#, "c-7f3a91".to_string()),
            (r#""c-\u0037f""#, "c-7f".to_string()),
            ("42", "42".to_string()),
            ("-7", "-7".to_string()),
            ("0", "0".to_string()),
            ("18446744073709551615", u64::MAX.to_string()),
            ("-9223372036854775808", i64::MIN.to_string()),
            (long.as_str(), "é".repeat(128)),
        ] {
            for shaped in [false, true] {
                let event = parse_card(raw, shaped);
                assert_eq!(event.map(|e| e.unit), Ok(Some(7)), "card = {raw}");
                assert_eq!(*seen.borrow(), vec![canonical.as_bytes()], "card = {raw}");
            }
        }
        // "42" and 42 are the same unit.
        let as_text = parse(with_field("card", Some(r#""42""#)).as_bytes()).map(|e| e.unit);
        let as_int = parse(with_field("card", Some("42")).as_bytes()).map(|e| e.unit);
        assert_eq!(as_text, as_int);

        let too_long = format!("\"{}a\"", "é".repeat(128)); // 257 bytes
        for raw in [
            r#""""#,
            too_long.as_str(),
            "3.5",
            "1e3",
            "-0",
            "18446744073709551616",
            "-9223372036854775809",
            "1e400",
            "true",
            "null",
            "[]",
            "{}",
        ] {
            for shaped in [false, true] {
                let rejection = parse_card(raw, shaped).expect_err(raw);
                assert_eq!(rejection.reason, RejectReason::BadUnitId, "card = {raw}");
                assert_eq!(rejection.field.as_deref(), Some("card"));
                assert!(
                    seen.borrow().is_empty(),
                    "a bad unit id must not reach the hash: {raw}"
                );
            }
        }
    }

    /// The slots of a shape's values in line order.
    fn shape_slots(shape: &LineShape) -> Vec<Option<Slot>> {
        shape.fields.iter().map(|&(_, slot)| slot).collect()
    }

    #[test]
    fn line_shape_is_learned_from_accepted_lines_and_relearned_after_misses() {
        let parser = demo_parser();
        let hash = &test_hash;
        let mut shape = LineShape::new();
        // Rejected lines teach nothing, whatever their layout.
        for rejected in [
            with_field("zone", Some(r#""moon""#)),
            with_field("ts", None),
            r#"{"ts":"#.to_string(),
        ] {
            assert!(
                parser
                    .parse_with_shape(rejected.as_bytes(), hash, &mut shape)
                    .is_err()
            );
            assert!(!shape.is_learned(), "{rejected}");
        }
        // Nor do lines that only the serde path accepts (an array).
        let nested = SCENARIO_LINE.replace(r#""transfers":0"#, r#""transfers":0,"x":[1]"#);
        parser
            .parse_with_shape(nested.as_bytes(), hash, &mut shape)
            .expect("valid");
        assert!(!shape.is_learned());
        // The first line the fast path accepts does; its gaps are the line without its
        // values.
        let first = r#"{ "ts": "2026-03-02T08:14:07Z","x":true,"card":"c","mode":"tram","zone":"harbour","fare_cents":1,"trip_km":2,"trip_minutes":3,"transfers":0 } "#;
        parser
            .parse_with_shape(first.as_bytes(), hash, &mut shape)
            .expect("valid");
        assert_eq!(
            String::from_utf8_lossy(&shape.gaps),
            r#"{ "ts": ,"x":,"card":,"mode":,"zone":,"fare_cents":,"trip_km":,"trip_minutes":,"transfers": } "#
        );
        let learned = shape_slots(&shape);
        assert_eq!(learned[..3], [Some(Slot::Time), None, Some(Slot::Unit)]);
        // A line of that layout is read along the shape, and counts as a hit.
        let next = first.replace(r#""c""#, r#""d""#).replace("true", "null");
        let event = parser
            .parse_shape(&next, &shape, hash)
            .expect("follows the shape");
        assert_eq!(event.unit, Some(test_hash(b"d")));
        // A line with a fault does not: the fast path gives the same rejection.
        let fault = first.replace("harbour", "moon");
        assert!(parser.parse_shape(&fault, &shape, hash).is_none());
        // Lines of another layout are misses; the 16th accepted one in a row replaces the
        // shape.
        for i in 1..=RELEARN_AFTER_MISSES {
            let other = SCENARIO_LINE.replace("c-7f3a91", &format!("c-{i}"));
            let event = parser.parse_with_shape(other.as_bytes(), hash, &mut shape);
            assert_eq!(
                event.map(|e| e.unit),
                Ok(Some(test_hash(format!("c-{i}").as_bytes())))
            );
            let relearned = i == RELEARN_AFTER_MISSES;
            assert_eq!(shape_slots(&shape) == learned, !relearned, "line {i}");
            assert_eq!(shape.misses, if relearned { 0 } else { i });
        }
        assert_eq!(
            String::from_utf8_lossy(&shape.gaps),
            r#"{"ts":,"card":,"mode":,"zone":,"fare_cents":,"trip_km":,"trip_minutes":,"transfers":}"#
        );
        // A hit resets the count of misses.
        parser
            .parse_with_shape(first.as_bytes(), hash, &mut shape)
            .expect("valid");
        assert_eq!(shape.misses, 1);
        parser
            .parse_with_shape(SCENARIO_LINE.as_bytes(), hash, &mut shape)
            .expect("valid");
        assert_eq!(shape.misses, 0);
        // A shape never holds values: only separators and key names.
        assert!(!String::from_utf8_lossy(&shape.gaps).contains("c-"));
    }

    #[test]
    fn numbers_must_be_finite_json_numbers_within_1e15() {
        let value =
            |raw: &str| parse(with_field("fare_cents", Some(raw)).as_bytes()).map(|e| e.numbers[0]);
        assert_eq!(value("1000000000000000"), Ok(1e15));
        assert_eq!(value("-1000000000000000"), Ok(-1e15));
        assert_eq!(value("1e15"), Ok(1e15));
        assert_eq!(value("5e-324"), Ok(5e-324));
        assert_eq!(value("-0").map(f64::to_bits), Ok((-0.0f64).to_bits()));
        // 999999999999999 (< 2^53) converts exactly.
        assert_eq!(value("999999999999999"), Ok(999_999_999_999_999.0));
        // A zero significand stays zero whatever the exponent (RFC 8259 §6 value semantics).
        assert_eq!(value(&format!("0.{}e400", "0".repeat(50))), Ok(0.0));
        let out_of_range = Err(Rejection {
            reason: RejectReason::NumberOutOfRange,
            field: Some(Arc::from("fare_cents")),
        });
        for raw in [
            "1000000000000001",
            "-1000000000000001",
            // The next f64 above 1e15 (1e15 + 0.125; spacing of binary64 at 2^49..2^50).
            "1000000000000000.125",
            "1e16",
            "18446744073709551615",
            "-9223372036854775808",
            "1.7976931348623157e308",
            // Overflows f64: serde_json refuses these; mapped from the error (see
            // json_error_rejection).
            "1e400",
            "-1e400",
            "1E+400",
            "123e99999999999999999999",
            &"9".repeat(400),
            // 1e-51 × 1e400 = 1e349: a long fraction does not hide the overflow.
            &format!("0.{}1e400", "0".repeat(50)),
        ] {
            assert_eq!(value(raw), out_of_range, "fare_cents = {raw}");
        }
        let wrong_type = Err(Rejection {
            reason: RejectReason::WrongType,
            field: Some(Arc::from("fare_cents")),
        });
        for raw in [
            r#""12""#,
            r#""NaN""#,
            r#""Infinity""#,
            "null",
            "true",
            "[12]",
            r#"{"v":12}"#,
        ] {
            assert_eq!(value(raw), wrong_type, "fare_cents = {raw}");
        }
        // Bare NaN/Infinity are not JSON (RFC 8259 §6).
        for raw in ["NaN", "Infinity", "-Infinity", "+1", "01", "1.", ".5"] {
            check(
                with_field("fare_cents", Some(raw)).as_bytes(),
                RejectReason::InvalidJson,
                None,
            );
        }
    }

    #[test]
    fn overflow_is_only_number_out_of_range_on_a_well_formed_line() {
        // Overflow in a skipped key is not even converted.
        let skipped = SCENARIO_LINE.replacen('{', r#"{"noise":1e400,"#, 1);
        assert!(parse(skipped.as_bytes()).is_ok());
        // Overflow in a schema field of a line that is also malformed later: syntax wins.
        let line = with_field("fare_cents", Some("1e400"));
        check(
            &line.as_bytes()[..line.len() - 1],
            RejectReason::InvalidJson,
            None,
        );
        check(
            format!("{line} x").as_bytes(),
            RejectReason::InvalidJson,
            None,
        );
        // Overflow where the slot expects another type maps to the slot's reason.
        check(
            with_field("zone", Some("1e400")).as_bytes(),
            RejectReason::WrongType,
            Some("zone"),
        );
        // A string that looks like an overflowing number is just a string.
        check(
            with_field("zone", Some(r#""1e400""#)).as_bytes(),
            RejectReason::UnknownCategory,
            Some("zone"),
        );
        // A first fault earlier in the line stands; the later overflow is only skimmed.
        let both = with_field("mode", Some(r#""rocket""#)).replace("240", "1e400");
        check(both.as_bytes(), RejectReason::UnknownCategory, Some("mode"));
        // Whitespace and newlines around the literal do not hide it.
        let spaced = SCENARIO_LINE.replace(r#""fare_cents":240"#, "\"fare_cents\" :\n\t 1e400 \n");
        check(
            spaced.as_bytes(),
            RejectReason::NumberOutOfRange,
            Some("fare_cents"),
        );
    }

    #[test]
    fn categories_must_be_strings_in_their_domain() {
        let zone = |raw: &str| {
            parse(with_field("zone", Some(raw)).as_bytes()).map(|e| e.categories.to_vec())
        };
        assert_eq!(zone(r#""riverside""#), Ok(vec![3, 0]));
        // JSON escapes are decoded before the lookup: \u006f is "o".
        assert_eq!(zone(r#""harb\u006fur""#), Ok(vec![0, 0]));
        for raw in [
            r#""Harbour""#,
            r#"" harbour""#,
            r#""""#,
            r#""harbour\u0000""#,
        ] {
            check(
                with_field("zone", Some(raw)).as_bytes(),
                RejectReason::UnknownCategory,
                Some("zone"),
            );
        }
        for raw in ["0", "null", "true", r#"["harbour"]"#, r#"{"harbour":1}"#] {
            check(
                with_field("mode", Some(raw)).as_bytes(),
                RejectReason::WrongType,
                Some("mode"),
            );
        }
    }

    #[test]
    fn structural_reasons() {
        check(b"", RejectReason::EmptyLine, None);
        check(b" \t\r\n ", RejectReason::EmptyLine, None);
        // Form feed is not JSON whitespace (RFC 8259 §2), so it is malformed JSON.
        check(b"\x0c", RejectReason::InvalidJson, None);
        check(b"{\"ts\":\"\xff\"}", RejectReason::InvalidUtf8, None);
        // An overlong encoding of '/' (RFC 3629 §3 forbids it) and a UTF-16 surrogate in UTF-8.
        check(b"{\"x\":\"\xc0\xaf\"}", RejectReason::InvalidUtf8, None);
        check(b"{\"x\":\"\xed\xa0\x80\"}", RejectReason::InvalidUtf8, None);
        for line in ["42", "\"ts\"", "null", "true", "[]", r#"[{"ts":0}]"#] {
            check(line.as_bytes(), RejectReason::NotAnObject, None);
        }
        let truncated = &SCENARIO_LINE[..SCENARIO_LINE.len() - 1];
        for line in [
            "{",
            "}",
            truncated,
            &format!("{SCENARIO_LINE}{SCENARIO_LINE}"),
            &format!("{SCENARIO_LINE},"),
            &format!("{SCENARIO_LINE} // note"),
            "[1,]",
            "{'ts':0}",
            "\u{feff}{}",
            // A raw control character inside a string (RFC 8259 §7 requires escaping).
            &SCENARIO_LINE.replace("c-7f3a91", "c-7f\u{1}3a91"),
            // A lone surrogate escape in a field that is read.
            &with_field("zone", Some(r#""\ud800""#)),
        ] {
            check(line.as_bytes(), RejectReason::InvalidJson, None);
        }
        // CRLF from a Windows reader is whitespace after the object.
        assert!(parse(format!("{SCENARIO_LINE}\r\n").as_bytes()).is_ok());
    }

    #[test]
    fn syntax_errors_win_over_earlier_field_faults() {
        let bad_time = with_field("ts", Some(r#""yesterday""#));
        check(bad_time.as_bytes(), RejectReason::BadTimestamp, Some("ts"));
        check(&bad_time.as_bytes()[..40], RejectReason::InvalidJson, None);
        check(
            format!("{bad_time}}}").as_bytes(),
            RejectReason::InvalidJson,
            None,
        );
    }

    #[test]
    fn duplicate_and_missing_fields() {
        let twice = SCENARIO_LINE.replacen('{', r#"{"zone":"uplands","#, 1);
        check(twice.as_bytes(), RejectReason::DuplicateField, Some("zone"));
        // Even with an identical value, and even when the line has another fault later.
        let same = SCENARIO_LINE.replacen('}', r#","transfers":0}"#, 1);
        check(
            same.as_bytes(),
            RejectReason::DuplicateField,
            Some("transfers"),
        );
        // The key is compared after unescaping: "\u0074s" is "ts".
        let escaped = SCENARIO_LINE.replacen('}', r#","\u0074s":0}"#, 1);
        check(escaped.as_bytes(), RejectReason::DuplicateField, Some("ts"));
        // Repeated keys that are not schema fields are skipped like any other.
        let other = SCENARIO_LINE.replacen('{', r#"{"x":1,"x":2,"#, 1);
        assert!(parse(other.as_bytes()).is_ok());

        for field in [
            "ts",
            "card",
            "zone",
            "mode",
            "fare_cents",
            "trip_km",
            "trip_minutes",
            "transfers",
        ] {
            check(
                with_field(field, None).as_bytes(),
                RejectReason::MissingField,
                Some(field),
            );
        }
        // Several missing: the first in schema order (time, unit, categories, numbers).
        check(b"{}", RejectReason::MissingField, Some("ts"));
        check(
            br#"{"ts":0,"card":"a","zone":"harbour"}"#,
            RejectReason::MissingField,
            Some("mode"),
        );
        // A field fault earlier in the line beats a missing field.
        check(
            br#"{"zone":"moon"}"#,
            RejectReason::UnknownCategory,
            Some("zone"),
        );
    }

    #[test]
    fn line_length_is_checked_before_anything_else() {
        let mut schema = demo_schema();
        schema.max_line_bytes = SCENARIO_LINE.len();
        let parser = LineParser::new(schema).expect("valid schema");
        assert!(parser.parse(SCENARIO_LINE.as_bytes(), &test_hash).is_ok());
        let longer = format!("{SCENARIO_LINE} ");
        let rejection = parser
            .parse(longer.as_bytes(), &test_hash)
            .expect_err("one byte over");
        assert_eq!(rejection, Rejection::line(RejectReason::LineTooLong));
        // Too long wins over every other fault, even invalid UTF-8 and blank lines.
        let garbage = vec![0xffu8; SCENARIO_LINE.len() + 1];
        let blank = vec![b' '; SCENARIO_LINE.len() + 1];
        for line in [garbage, blank] {
            let reason = parser.parse(&line, &test_hash).map_err(|r| r.reason);
            assert_eq!(reason, Err(RejectReason::LineTooLong));
        }
    }

    #[test]
    fn deep_nesting_costs_no_recursion() {
        // 200,000 levels would overflow any recursive parser's stack; serde_json skims
        // ignored values with an explicit stack, and this parser only ever skims nesting.
        let depth = 200_000;
        let nested = format!("{}{}", "[".repeat(depth), "]".repeat(depth));
        let mut schema = demo_schema();
        schema.max_line_bytes = 2 * depth + 1000;
        let parser = LineParser::new(schema).expect("valid schema");
        let in_extra_key = SCENARIO_LINE.replacen('{', &format!(r#"{{"deep":{nested},"#), 1);
        assert!(parser.parse(in_extra_key.as_bytes(), &test_hash).is_ok());
        let in_field = with_field("trip_km", Some(&nested));
        let rejection = parser
            .parse(in_field.as_bytes(), &test_hash)
            .expect_err("array");
        assert_eq!(rejection.reason, RejectReason::WrongType);
        let top = parser
            .parse(nested.as_bytes(), &test_hash)
            .map_err(|r| r.reason);
        assert_eq!(top, Err(RejectReason::NotAnObject));
        let unbalanced = parser.parse(&nested.as_bytes()[..depth + 10], &test_hash);
        assert_eq!(
            unbalanced.map_err(|r| r.reason),
            Err(RejectReason::InvalidJson)
        );
    }

    #[test]
    fn event_level_schema_has_no_unit() {
        let mut schema = demo_schema();
        schema.unit_field = None;
        let parser = LineParser::new(schema).expect("valid schema");
        let event = parser
            .parse(SCENARIO_LINE.as_bytes(), &test_hash)
            .expect("valid");
        assert_eq!(event.unit, None);
        // "card" is now an ordinary skipped key, so even a bad one is fine.
        let line = with_field("card", Some("[]"));
        assert!(parser.parse(line.as_bytes(), &test_hash).is_ok());
    }

    #[test]
    fn rejections_never_carry_line_content() {
        let canary = "c-CANARY-SECRET";
        let lines = [
            with_field("card", Some(&format!("\"{canary}\""))).replace("harbour", canary),
            with_field("ts", Some(&format!("\"{canary}\""))),
            with_field("fare_cents", Some(&format!("\"{canary}\""))),
            format!("{{\"{canary}\":1,\"{canary}\":2,\"ts\":\"{canary}\""),
            format!("[\"{canary}\"]"),
        ];
        for line in &lines {
            let rejection = parse(line.as_bytes()).expect_err("each line has a fault");
            let shown = format!("{rejection} {rejection:?}");
            assert!(!shown.contains("CANARY"), "{shown}");
        }
    }

    #[test]
    fn schema_errors() {
        let with = |edit: fn(&mut Schema)| {
            let mut schema = demo_schema();
            edit(&mut schema);
            LineParser::new(schema).map(|_| ())
        };
        assert_eq!(
            with(|s| s.numbers.push("zone".into())),
            Err(SchemaError::DuplicateField {
                field: "zone".into()
            })
        );
        assert_eq!(
            with(|s| s.unit_field = Some("ts".into())),
            Err(SchemaError::DuplicateField { field: "ts".into() })
        );
        assert_eq!(
            with(|s| s.numbers.push("trip_km".into())),
            Err(SchemaError::DuplicateField {
                field: "trip_km".into()
            })
        );
        assert_eq!(
            with(|s| s.numbers.push(String::new())),
            Err(SchemaError::EmptyFieldName)
        );
        assert_eq!(
            with(|s| s.categories[1].1.clear()),
            Err(SchemaError::EmptyDomain {
                field: "mode".into()
            })
        );
        assert_eq!(
            with(|s| s.categories[1].1.push("tram".into())),
            Err(SchemaError::DuplicateValue {
                field: "mode".into(),
                value: "tram".into()
            })
        );
        assert_eq!(
            with(|s| s.max_line_bytes = 0),
            Err(SchemaError::ZeroMaxLineBytes)
        );
        // Messages are lowercase (style.md) and name the field.
        let message = SchemaError::EmptyDomain {
            field: "mode".into(),
        }
        .to_string();
        assert!(message.starts_with("category field 'mode'"), "{message}");
    }

    #[test]
    fn reasons_have_stable_distinct_snake_case_labels() {
        let labels: Vec<&str> = RejectReason::ALL.iter().map(|r| r.label()).collect();
        let mut unique = labels.clone();
        unique.sort_unstable();
        unique.dedup();
        assert_eq!(unique.len(), labels.len());
        for (i, reason) in RejectReason::ALL.iter().enumerate() {
            assert_eq!(reason.index(), i);
            assert_eq!(RejectReason::from_label(reason.label()), Some(*reason));
            // Prometheus label values may be anything, but the contract wants snake_case.
            let snake = |b: u8| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'_';
            assert!(reason.label().bytes().all(snake), "{}", reason.label());
            let text = reason.to_string();
            assert_eq!(text, text.to_lowercase());
        }
        assert_eq!(RejectReason::InvalidUtf8.label(), "invalid_utf8");
        assert_eq!(RejectReason::from_label("nope"), None);
    }

    // -----------------------------------------------------------------------------------
    // The fast path against the serde path (the reference: serde_json 1.0.154 through the
    // same per-key logic). RFC 8259 is the reference for the grammar.
    // -----------------------------------------------------------------------------------

    /// Checks that `parse` and the fast path's own answer (when it gives one) equal
    /// `parse_serde` on `line`, and returns the fast path's answer (`None`: it gave up).
    #[track_caller]
    fn fast_and_serde(line: &str) -> Option<Result<Event, Rejection>> {
        let parser = demo_parser();
        let reference = parser.parse_serde(line.as_bytes(), &test_hash);
        let full = parser.parse(line.as_bytes(), &test_hash);
        assert!(
            same_parse_result(&full, &reference),
            "{line:?}: parse {full:?}, parse_serde {reference:?}"
        );
        // A reader that checked the line's UTF-8 already hands it as text: same verdict.
        let as_text =
            parser.parse_raw_with_shape(RawLine::Text(line), &test_hash, &mut LineShape::new());
        assert!(
            same_parse_result(&as_text, &reference),
            "{line:?}: as RawLine::Text {as_text:?}, parse_serde {reference:?}"
        );
        let text = parser.object_text(RawLine::Text(line)).ok()?;
        let fast = parser.parse_fast(text, &test_hash);
        if let Some(fast) = &fast {
            assert!(
                same_parse_result(fast, &reference),
                "{line:?}: fast path {fast:?}, parse_serde {reference:?}"
            );
        }
        fast
    }

    /// The fast path answers `line` (and agrees with serde_json).
    #[track_caller]
    fn fast_answers(line: &str) -> Result<Event, Rejection> {
        fast_and_serde(line).unwrap_or_else(|| panic!("fast path gave up on {line:?}"))
    }

    /// The fast path gives up on `line`; returns the serde path's verdict.
    #[track_caller]
    fn fast_gives_up(line: &str) -> Result<Event, Rejection> {
        let fast = fast_and_serde(line);
        assert!(fast.is_none(), "fast path answered {line:?} with {fast:?}");
        demo_parser().parse_serde(line.as_bytes(), &test_hash)
    }

    fn reason(result: Result<Event, Rejection>) -> Option<(RejectReason, Option<String>)> {
        result
            .err()
            .map(|r| (r.reason, r.field.as_deref().map(str::to_string)))
    }

    #[test]
    fn fast_path_numbers_are_the_variants_serde_json_produces() {
        let fare = |raw: &str| fast_answers(&with_field("fare_cents", Some(raw)));
        let bits = |raw: &str| fare(raw).map(|e| e.numbers[0].to_bits());
        // serde_json: `-0` is F64(-0.0) (de.rs parse_number: wrapping negation of 0 is not
        // negative); `-0.0`, `-0e0` and `-0E-5` are -0.0 too (sign applied after the value).
        for negative_zero in ["-0", "-0.0", "-0e0", "-0E-5", "-0.000e+3"] {
            assert_eq!(
                bits(negative_zero),
                Ok((-0.0f64).to_bits()),
                "{negative_zero}"
            );
        }
        for zero in ["0", "0.0", "0e0", "0E+400"] {
            assert_eq!(bits(zero), Ok(0.0f64.to_bits()), "{zero}");
        }
        // RFC 8259 §6: e and E, with an optional sign.
        for hundred in [
            "1e2", "1E2", "1E+2", "1e+2", "100", "100.0", "1000e-1", "0.1e3",
        ] {
            assert_eq!(bits(hundred), Ok(100.0f64.to_bits()), "{hundred}");
        }
        // Correctly rounded like serde_json's float_roundtrip and std: Clinger's fast path
        // and beyond it (exponent past 22, significand past 2^53).
        for (raw, want) in [
            ("3.8", 3.8f64),
            ("0.1", 0.1),
            ("-14.5", -14.5),
            ("5e-324", 5e-324),
            ("2.2250738585072014e-308", 2.2250738585072014e-308),
            ("1.5e-30", 1.5e-30),
            ("123456789012345.67", 123_456_789_012_345.67),
            ("9007199254740993e-1", 900_719_925_474_099.3),
            (
                "0.3000000000000000166533453693773481063544750213623046875",
                0.3,
            ),
        ] {
            let got = fast_and_serde(&with_field("fare_cents", Some(raw)));
            if let Some(got) = got {
                assert_eq!(
                    got.map(|e| e.numbers[0].to_bits()),
                    Ok(want.to_bits()),
                    "{raw}"
                );
            }
        }
        // Integers: 19 and 20 digits, u64::MAX, i64::MIN are U64/I64 on the fast path.
        let card = |raw: &str| {
            let line = with_field("card", Some(raw));
            fast_answers(&line).map(|e| e.unit)
        };
        for raw in [
            "1234567890123456789",
            "12345678901234567890",
            "18446744073709551615",
            "-9223372036854775808",
            "9223372036854775808",
            "0",
        ] {
            assert_eq!(
                card(raw),
                Ok(Some(test_hash(raw.as_bytes()))),
                "card = {raw}"
            );
        }
        // Negative magnitudes above 2^63 and -0 are F64 in serde_json: not a unit id.
        for raw in ["-9223372036854775809", "-18446744073709551615", "-0"] {
            assert_eq!(
                reason(fast_answers(&with_field("card", Some(raw)))),
                Some((RejectReason::BadUnitId, Some("card".into()))),
                "card = {raw}"
            );
        }
        assert_eq!(
            reason(fare("18446744073709551615")),
            Some((RejectReason::NumberOutOfRange, Some("fare_cents".into())))
        );
        assert_eq!(
            reason(fare("1.7976931348623157e308")),
            Some((RejectReason::NumberOutOfRange, Some("fare_cents".into())))
        );
    }

    #[test]
    fn fast_path_gives_up_where_serde_json_decides() {
        let out_of_range = Some((RejectReason::NumberOutOfRange, Some("fare_cents".into())));
        // Overflowing f64: serde_json errs, json_error_rejection maps it.
        for raw in ["1e400", "-1e400", "1E+400", "123e99999999999999999999"] {
            let line = with_field("fare_cents", Some(raw));
            assert_eq!(reason(fast_gives_up(&line)), out_of_range, "{raw}");
        }
        // Integers beyond u64 (serde_json: F64 via its long-integer path).
        for raw in [
            "18446744073709551616",
            "-18446744073709551616",
            &"9".repeat(30),
        ] {
            let line = with_field("fare_cents", Some(raw));
            assert_eq!(reason(fast_gives_up(&line)), out_of_range, "{raw}");
            assert_eq!(
                reason(fast_gives_up(&with_field("card", Some(raw)))),
                Some((RejectReason::BadUnitId, Some("card".into())))
            );
        }
        // Floats with more than 19 digits or 9 exponent digits.
        assert_eq!(
            fast_gives_up(&with_field("fare_cents", Some("0.12345678901234567890")))
                .map(|e| e.numbers[0].to_bits()),
            Ok(0.123_456_789_012_345_68f64.to_bits())
        );
        assert!(fast_gives_up(&with_field("fare_cents", Some("1e0000000001"))).is_ok());
        // Escapes in keys and values (RFC 8259 §7) only ever go through serde_json.
        let escaped_key = SCENARIO_LINE.replacen('}', r#","\u0074s":0}"#, 1);
        assert_eq!(
            reason(fast_gives_up(&escaped_key)),
            Some((RejectReason::DuplicateField, Some("ts".into())))
        );
        assert!(fast_gives_up(&with_field("zone", Some(r#""harb\u006fur""#))).is_ok());
        assert!(fast_gives_up(&with_field("card", Some(r#""c-\"7f""#))).is_ok());
        assert!(fast_gives_up(&SCENARIO_LINE.replacen('{', r#"{"x\n":1,"#, 1)).is_ok());
        // Nested values, even in unknown keys.
        assert!(fast_gives_up(&SCENARIO_LINE.replacen('{', r#"{"x":[1],"#, 1)).is_ok());
        assert!(fast_gives_up(&SCENARIO_LINE.replacen('{', r#"{"x":{},"#, 1)).is_ok());
        // Syntax irregularities (RFC 8259 §2, §4, §6): serde_json says InvalidJson.
        let invalid = Some((RejectReason::InvalidJson, None));
        for raw in [
            "01", "1.", ".5", "+1", "-", "1e", "1e+", "--1", "0x1", "1.2.3", "tru",
        ] {
            let line = with_field("fare_cents", Some(raw));
            assert_eq!(reason(fast_gives_up(&line)), invalid, "fare_cents = {raw}");
            // The same in a skipped key.
            let line = SCENARIO_LINE.replacen('{', &format!(r#"{{"x":{raw},"#), 1);
            assert_eq!(reason(fast_gives_up(&line)), invalid, "x = {raw}");
        }
        for line in [
            format!("{SCENARIO_LINE} x"),
            format!("{SCENARIO_LINE}}}"),
            format!("{SCENARIO_LINE},"),
            SCENARIO_LINE.replacen('}', ",}", 1),
            SCENARIO_LINE.replacen(':', " ", 1),
            SCENARIO_LINE.replacen(',', ",,", 1),
            SCENARIO_LINE.replacen("\"ts\"", "ts", 1),
            SCENARIO_LINE[..SCENARIO_LINE.len() - 1].to_string(),
            SCENARIO_LINE.replace("c-7f3a91", "c-7f\u{1}3a91"),
            format!("{SCENARIO_LINE}\u{c}"),
            "{\"ts\":0".into(),
            "{,}".into(),
        ] {
            assert_eq!(reason(fast_gives_up(&line)), invalid, "{line:?}");
        }
    }

    #[test]
    fn fast_path_answers_duplicates_unknown_keys_and_whitespace() {
        let twice = SCENARIO_LINE.replacen('{', r#"{"zone":"uplands","#, 1);
        assert_eq!(
            reason(fast_answers(&twice)),
            Some((RejectReason::DuplicateField, Some("zone".into())))
        );
        // A duplicate after another fault: the first fault stands.
        let both = with_field("mode", Some(r#""rocket""#)).replacen('}', r#","mode":"bus"}"#, 1);
        assert_eq!(
            reason(fast_answers(&both)),
            Some((RejectReason::UnknownCategory, Some("mode".into())))
        );
        // Unknown keys with literals, numbers and strings are skipped; their numbers are
        // never converted, so an overflowing one is fine there (as with IgnoredAny).
        for extra in [
            r#""a":true,"b":false,"c":null,"#,
            r#""x":1e400,"y":-0,"z":"é ☃","#,
            r#""x":1,"x":2,"#,
            r#""":0,"#,
        ] {
            let line = SCENARIO_LINE.replacen('{', &format!("{{{extra}"), 1);
            assert!(fast_answers(&line).is_ok(), "{line}");
        }
        // Literals in schema fields are Other.
        assert_eq!(
            reason(fast_answers(&with_field("trip_km", Some("null")))),
            Some((RejectReason::WrongType, Some("trip_km".into())))
        );
        assert_eq!(
            reason(fast_answers(&with_field("ts", Some("true")))),
            Some((RejectReason::BadTimestamp, Some("ts".into())))
        );
        // JSON whitespace (RFC 8259 §2) anywhere between tokens, and after the object.
        let spaced = SCENARIO_LINE
            .replace("\":", "\" \t: \r\n")
            .replace(',', "\n ,\t")
            .replacen('{', " \r\n\t{ ", 1);
        assert!(fast_answers(&format!("{spaced} \t\r\n")).is_ok());
        assert_eq!(
            reason(fast_answers("{}")),
            Some((RejectReason::MissingField, Some("ts".into())))
        );
        assert_eq!(
            reason(fast_answers(" { \t} ")),
            Some((RejectReason::MissingField, Some("ts".into())))
        );
        // Values that look like other things stay what they are.
        assert_eq!(
            reason(fast_answers(&with_field("zone", Some(r#""1e400""#)))),
            Some((RejectReason::UnknownCategory, Some("zone".into())))
        );
        assert_eq!(
            reason(fast_answers(&with_field("zone", Some("1")))),
            Some((RejectReason::WrongType, Some("zone".into())))
        );
    }

    #[test]
    fn both_paths_call_the_unit_hash_alike() {
        let calls = RefCell::new(Vec::<Vec<u8>>::new());
        let recorder = |bytes: &[u8]| {
            calls.borrow_mut().push(bytes.to_vec());
            7
        };
        let parser = demo_parser();
        let escaped_later = SCENARIO_LINE.replacen('}', r#","x":"\n"}"#, 1);
        let unknown_after = with_field("zone", Some(r#""moon""#));
        let overflow_after = with_field("transfers", Some("1e400"));
        for line in [
            SCENARIO_LINE.to_string(),
            with_field("card", Some("42")),
            escaped_later,
            unknown_after,
            overflow_after,
            with_field("card", Some("null")),
            format!("{SCENARIO_LINE} x"),
        ] {
            calls.borrow_mut().clear();
            let fast = parser.parse(line.as_bytes(), &recorder);
            let fast_calls = calls.replace(Vec::new());
            let reference = parser.parse_serde(line.as_bytes(), &recorder);
            let reference_calls = calls.replace(Vec::new());
            assert!(same_parse_result(&fast, &reference), "{line}");
            assert_eq!(fast_calls, reference_calls, "{line}");
            assert!(fast_calls.len() <= 1, "{line}");
        }
    }

    #[test]
    fn string_stop_finds_the_first_quote_backslash_or_control_byte() {
        // The byte loop over STRING_STOP is the reference for the eight-byte scan.
        let reference = |b: &[u8]| b.iter().position(|&x| STRING_STOP[usize::from(x)]);
        let mut cases: Vec<Vec<u8>> = vec![b"".to_vec(), b"abc".to_vec(), b"harbour\"".to_vec()];
        for len in 0..24 {
            for stop in [b'"', b'\\', 0x00, 0x1f, 0x01] {
                for at in 0..len {
                    let mut v: Vec<u8> = (0..len).map(|i| b'a' + (i % 26) as u8).collect();
                    v[at] = stop;
                    // Bytes just around the stop classes must not be marked.
                    if at + 1 < len {
                        v[at + 1] = [0x20, 0x21, 0x5b, 0x5d, 0xff, 0x80][at % 6];
                    }
                    cases.push(v);
                }
            }
            cases.push(
                (0..len)
                    .map(|i| 0x20 + (i % 0x60) as u8)
                    .filter(|&b| b != b'"' && b != b'\\')
                    .collect(),
            );
            cases.push(vec![0xc3; len]);
        }
        for case in &cases {
            assert_eq!(string_stop(case), reference(case), "{case:?}");
        }
    }

    #[test]
    fn name_tables_match_exactly() {
        let names: Vec<(Box<str>, u32)> = [
            "",
            "a",
            "ab",
            "abcdefg",
            "abcdefgh",
            "abcdefghi",
            "abcdefgh1",
            "abcdefgh2",
            "station-000001",
            "station-000002",
            "é",
            "très-long-nom-de-champ-0123456789",
        ]
        .iter()
        .enumerate()
        .map(|(i, n)| (Box::from(*n), i as u32))
        .collect();
        let table = NameTable::new(names.clone());
        for (name, value) in &names {
            assert_eq!(table.get(name.as_bytes()), Some(*value), "{name}");
        }
        for miss in [
            "b",
            "abcdefgh3",
            "abcdefgh\0",
            "station-00000",
            "A",
            "e",
            "a\0",
        ] {
            assert_eq!(table.get(miss.as_bytes()), None, "{miss}");
        }
        // Many names sharing a long prefix still resolve (a hash of every byte).
        let many: Vec<(Box<str>, u32)> = (0..1000u32)
            .map(|i| (format!("station-{i:06}").into_boxed_str(), i))
            .collect();
        let table = NameTable::new(many);
        for i in (0..1000u32).step_by(7) {
            assert_eq!(table.get(format!("station-{i:06}").as_bytes()), Some(i));
        }
        assert_eq!(table.get(b"station-001000"), None);
    }

    /// Pieces of lines: schema and other keys (some escaped), and values of every kind,
    /// valid and not.
    fn key_text() -> impl Strategy<Value = String> {
        prop_oneof![
            4 => proptest::sample::select(vec![
                "ts", "card", "zone", "mode", "fare_cents", "trip_km", "trip_minutes",
                "transfers",
            ])
            .prop_map(|k| format!("\"{k}\"")),
            1 => proptest::sample::select(vec![
                r#""\u0074s""#, r#""zon\u0065""#, r#""x""#, r#""""#, r#""ts ""#, r#""é""#,
                r#""x\"y""#, "x", "\"a\u{1}\"",
            ])
            .prop_map(str::to_string),
        ]
    }

    fn value_text() -> impl Strategy<Value = String> {
        prop_oneof![
            // RFC 8259 §6 numbers, long and short, with big exponents.
            3 => "-?(0|[1-9][0-9]{0,22})(\\.[0-9]{1,22})?([eE][+-]?[0-9]{1,4})?",
            // Near-numbers: not all of them are JSON.
            1 => "[-+]?[0-9.eE+-]{1,8}",
            1 => proptest::sample::select(vec![
                "-0", "0", "-0.0", "18446744073709551615", "18446744073709551616",
                "-9223372036854775808", "-9223372036854775809", "1e400", "1e15",
                "1000000000000000", "1000000000000001", "9007199254740993",
                "1772439247000", "true", "false", "null", "nul", "[]", "[1,{\"a\":null}]",
                "{}", "{\"a\":1e400}",
            ])
            .prop_map(str::to_string),
            2 => proptest::sample::select(vec![
                "harbour", "old-town", "uplands", "riverside", "airport-link", "tram",
                "ferry", "bus", "2026-03-02T08:14:07Z", "2026-03-02T09:14:07.25+01:00",
                "c-7f3a91", "", "42",
            ])
            .prop_map(|s| format!("\"{s}\"")),
            1 => "\\PC{0,12}".prop_map(|s| serde_json::to_string(&s).expect("a string")),
            1 => proptest::sample::select(vec![
                r#""harb\u006fur""#, r#""\ud800""#, r#""a\"b""#, "\"a\u{1}\"", "\"é☃\"",
            ])
            .prop_map(str::to_string),
        ]
    }

    fn whitespace_text() -> impl Strategy<Value = String> {
        prop_oneof![4 => Just(String::new()), 1 => "[ \t\r\n]{1,3}", 1 => "[ \\x0c\\x00]"]
    }

    /// A line from pieces, then a few random byte edits (insert, delete, replace): the
    /// second line of [`same_layout_pair`].
    fn generated_line() -> impl Strategy<Value = Vec<u8>> {
        same_layout_pair().prop_map(|(_, line)| line)
    }

    fn apply_edits(line: &mut Vec<u8>, edits: &[(proptest::sample::Index, u8, u8)]) {
        for (at, kind, byte) in edits {
            let at = at.index(line.len() + 1);
            match kind {
                0 => line.insert(at, *byte),
                1 if at < line.len() => {
                    line.remove(at);
                }
                _ if at < line.len() => line[at] = *byte,
                _ => line.push(*byte),
            }
        }
    }

    /// Every parse path on `line`, compared bit for bit with the serde path (the proptests
    /// below): the fast path, and the shape path with no shape, with the shape of
    /// [`SCENARIO_LINE`], and with the shape of `line` itself (learned by a first parse).
    fn paths_agree(line: &[u8]) -> Result<(), TestCaseError> {
        let parser = demo_parser();
        let reference = parser.parse_serde(line, &test_hash);
        let fast = parser.parse(line, &test_hash);
        prop_assert!(
            same_parse_result(&fast, &reference),
            "{:?}: parse {fast:?}, parse_serde {reference:?}",
            String::from_utf8_lossy(line)
        );
        // The last two share one shape: the first of them learns `line` if it is accepted.
        let mut shapes = [LineShape::new(), scenario_shape(&parser), LineShape::new()];
        for i in [0, 1, 2, 2] {
            let shape = &mut shapes[i];
            let shaped = parser.parse_with_shape(line, &test_hash, shape);
            prop_assert!(
                same_parse_result(&shaped, &reference),
                "{:?}: parse_with_shape {shaped:?}, parse_serde {reference:?}, shape {shape:?}",
                String::from_utf8_lossy(line)
            );
        }
        Ok(())
    }

    /// The shape learned from [`SCENARIO_LINE`].
    fn scenario_shape(parser: &LineParser) -> LineShape {
        let mut shape = LineShape::new();
        parser
            .parse_with_shape(SCENARIO_LINE.as_bytes(), &test_hash, &mut shape)
            .expect("the scenario line is valid");
        assert!(shape.is_learned());
        shape
    }

    /// Two lines with the same keys and whitespace (the same gaps) and values drawn
    /// independently from the pieces above, the second with a few random byte edits.
    fn same_layout_pair() -> impl Strategy<Value = (Vec<u8>, Vec<u8>)> {
        let entry = (
            whitespace_text(),
            key_text(),
            whitespace_text(),
            value_text(),
            value_text(),
        );
        let edit = (any::<proptest::sample::Index>(), 0u8..3, any::<u8>());
        (
            proptest::collection::vec(entry, 0..12),
            whitespace_text(),
            prop_oneof![3 => Just(Vec::new()), 1 => proptest::collection::vec(edit, 1..4)],
        )
            .prop_map(|(entries, tail, edits)| {
                let line = |second: bool| {
                    let body: Vec<String> = entries
                        .iter()
                        .map(|(w1, k, w2, a, b)| {
                            format!("{w1}{k}{w2}:{w2}{}{w1}", if second { b } else { a })
                        })
                        .collect();
                    format!("{{{}}}{tail}", body.join(",")).into_bytes()
                };
                let mut second = line(true);
                apply_edits(&mut second, &edits);
                (line(false), second)
            })
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(4000))]

        /// `parse` (fast path with fallback) equals `parse_serde` (serde_json, the reference)
        /// on generated lines, valid and broken, bit for bit.
        #[test]
        fn fast_and_serde_paths_agree_on_generated_lines(line in generated_line()) {
            paths_agree(&line)?;
        }

        /// The same on valid demo lines (every field's value drawn from the pieces) with
        /// random byte edits.
        #[test]
        fn fast_and_serde_paths_agree_on_edited_demo_lines(
            field in proptest::sample::select(vec![
                "ts", "card", "zone", "mode", "fare_cents", "trip_km", "trip_minutes",
                "transfers",
            ]),
            value in value_text(),
            edits in proptest::collection::vec(
                (any::<proptest::sample::Index>(), 0u8..3, any::<u8>()),
                0..4,
            ),
        ) {
            let mut line = with_field(field, Some(&value)).into_bytes();
            apply_edits(&mut line, &edits);
            paths_agree(&line)?;
        }

        /// The shape path on a line laid out like the line its shape was learned from (the
        /// case it exists for), values and edits included, equals the serde path.
        #[test]
        fn shape_path_agrees_on_lines_of_a_learned_layout(
            (first, second) in same_layout_pair(),
        ) {
            let parser = demo_parser();
            let mut shape = LineShape::new();
            let learned = parser.parse_with_shape(&first, &test_hash, &mut shape);
            prop_assert!(same_parse_result(&learned, &parser.parse_serde(&first, &test_hash)));
            let shaped = parser.parse_with_shape(&second, &test_hash, &mut shape);
            let reference = parser.parse_serde(&second, &test_hash);
            prop_assert!(
                same_parse_result(&shaped, &reference),
                "{:?} after {:?}: parse_with_shape {shaped:?}, parse_serde {reference:?}",
                String::from_utf8_lossy(&second),
                String::from_utf8_lossy(&first)
            );
        }
    }

    #[test]
    fn json_number_grammar_matches_rfc8259() {
        // Examples straight from RFC 8259 §6's grammar.
        for ok in [
            "0",
            "-0",
            "1",
            "-12.5",
            "1e400",
            "1E+2",
            "1e-2",
            "0.0e0",
            "123456789",
        ] {
            assert!(is_json_number(ok.as_bytes()), "{ok}");
        }
        for bad in [
            "", "-", "+1", "01", "1.", ".1", "1e", "1e+", "--1", "1-", "e5", "1.2.3", "0x1",
        ] {
            assert!(!is_json_number(bad.as_bytes()), "{bad}");
        }
    }

    #[test]
    fn decimal_text_agrees_with_std_formatting() {
        // std's integer Display is the reference.
        let mut buf = [0u8; 21];
        for v in [0u64, 7, 10, 99, 1_000_000, u64::MAX] {
            assert_eq!(decimal_text(&mut buf, false, v), v.to_string().as_bytes());
        }
        for v in [-1i64, -10, -9_223_372_036_854_775_807, i64::MIN] {
            assert_eq!(
                decimal_text(&mut buf, true, v.unsigned_abs()),
                v.to_string().as_bytes()
            );
        }
        assert_eq!(
            decimal_text(&mut buf, true, u64::MAX),
            b"-18446744073709551615"
        );
    }

    #[test]
    fn error_positions_map_to_lines_and_columns() {
        assert_eq!(nth_line_start(b"ab\ncd\nef", 1), Some(0));
        assert_eq!(nth_line_start(b"ab\ncd\nef", 3), Some(6));
        assert_eq!(nth_line_start(b"ab\ncd\nef", 4), None);
        assert_eq!(nth_line_start(b"ab", 0), None);
        // serde_json's own report for an overflow sits on the literal.
        let text = "{\"a\":\n 1e400}";
        let err = serde_json::from_str::<serde_json::Value>(text).expect_err("overflow");
        assert!(overflowing_number_at(text, err.line(), err.column()));
        // A number inside a string is not a value after a colon.
        assert!(!overflowing_number_at(r#"{"a":"x 1e400"}"#, 1, 13));
    }
}
