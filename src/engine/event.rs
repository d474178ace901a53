//! The input boundary: turns one JSON line of the feed into a validated [`Event`], or into a
//! [`Rejection`] that names a reason and, where one is at fault, the schema field.
//!
//! # How a line is read
//! 1. More than `max_line_bytes` bytes: [`RejectReason::LineTooLong`], before anything else
//!    looks at the bytes (a hostile feed must not make us scan megabytes).
//! 2. Only JSON whitespace (space, tab, LF, CR; RFC 8259 §2): [`RejectReason::EmptyLine`].
//! 3. Not UTF-8: [`RejectReason::InvalidUtf8`] (RFC 8259 §8.1 requires UTF-8).
//! 4. One pass of serde_json over the text with a visitor that looks at every top-level key
//!    once: schema fields are interpreted on the spot (strings are borrowed, never copied),
//!    every other key is skipped with [`serde::de::IgnoredAny`], which serde_json walks with an
//!    explicit stack, so deep nesting in an ignored key costs neither recursion nor memory.
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

/// Parses lines against one [`Schema`]; built once, shared by reference.
///
/// Lookups are sorted tables searched by bisection: key names are compared as `&str`
/// borrowed from the line, so matching a key or a category value never allocates, and a
/// schema of a dozen fields needs about four comparisons per key.
#[derive(Debug)]
pub struct LineParser {
    schema: Schema,
    /// Every schema field name with its slot, sorted by name.
    keys: Vec<(Box<str>, Slot)>,
    /// Per category field: its values with their domain index, sorted by value.
    domains: Vec<Vec<(Box<str>, u32)>>,
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
            domains.push(table);
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
            keys,
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
        if line.len() > self.schema.max_line_bytes {
            return Err(Rejection::line(RejectReason::LineTooLong));
        }
        if line
            .iter()
            .all(|&b| matches!(b, b' ' | b'\t' | b'\n' | b'\r'))
        {
            return Err(Rejection::line(RejectReason::EmptyLine));
        }
        let Ok(text) = std::str::from_utf8(line) else {
            return Err(Rejection::line(RejectReason::InvalidUtf8));
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

    fn slot_of_key(&self, key: &str) -> Option<Slot> {
        self.keys
            .binary_search_by(|(name, _)| name.as_ref().cmp(key))
            .ok()
            .and_then(|i| self.keys.get(i))
            .map(|(_, slot)| *slot)
    }

    fn category_index(&self, category: usize, value: &str) -> Option<u32> {
        let table = self.domains.get(category)?;
        table
            .binary_search_by(|(name, _)| name.as_ref().cmp(value))
            .ok()
            .and_then(|i| table.get(i))
            .map(|(_, idx)| *idx)
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
            categories: smallvec::smallvec![CATEGORY_UNSEEN; parser.schema.categories.len()],
            numbers: smallvec::smallvec![f64::NAN; parser.schema.numbers.len()],
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
            let Some(slot) = slot else {
                map.next_value::<IgnoredAny>()?;
                continue;
            };
            if scan.fault.is_some() {
                // Only syntax matters after the first fault.
                map.next_value::<IgnoredAny>()?;
                continue;
            }
            if scan.is_filled(slot) {
                scan.fault = Some((RejectReason::DuplicateField, slot));
                map.next_value::<IgnoredAny>()?;
                continue;
            }
            scan.pending = Some(slot);
            let value = map.next_value_seed(ValueSeed {
                parser,
                unit_hash: scan.unit_hash,
                slot,
            })?;
            scan.pending = None;
            match value {
                Ok(value) => scan.fill(value, slot),
                Err(reason) => scan.fault = Some((reason, slot)),
            }
        }
        Ok(())
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
    use std::cell::RefCell;

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
            seen.borrow_mut().clear();
            let event = parser.parse(with_field("card", Some(raw)).as_bytes(), &recorder);
            assert_eq!(event.map(|e| e.unit), Ok(Some(7)), "card = {raw}");
            assert_eq!(*seen.borrow(), vec![canonical.into_bytes()], "card = {raw}");
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
            seen.borrow_mut().clear();
            let result = parser.parse(with_field("card", Some(raw)).as_bytes(), &recorder);
            let rejection = result.expect_err(raw);
            assert_eq!(rejection.reason, RejectReason::BadUnitId, "card = {raw}");
            assert_eq!(rejection.field.as_deref(), Some("card"));
            assert!(
                seen.borrow().is_empty(),
                "a bad unit id must not reach the hash: {raw}"
            );
        }
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
