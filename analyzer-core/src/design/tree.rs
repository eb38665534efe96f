//! A compact TOML document tree with spans, built from `toml_parser`'s event stream.
//!
//! The design file is TOML. The general-purpose document types (`toml`'s serde path and its
//! `DeTable`) keep every table in a map node of about a kilobyte, so a generated design of
//! 200,000 parts took 600–660 MB and 1.9 s to read. Here `toml_parser` (the lexer, the push
//! parser and the value decoders of the same project) does all of the TOML grammar and
//! decoding; this module only assembles the logical document from its events, in a tree that
//! keeps each table's entries in file order with the byte spans of every key and value:
//! about 170 bytes per part of a design, and the tokens are lexed and parsed in chunks of
//! whole top-level lines, so they never all sit in memory at once.
//!
//! The assembly follows the TOML 1.0 rules on defining tables: a key is defined once; a
//! `[table]` header defines a table once (it may first have been created implicitly by a
//! longer header); dotted keys create tables that no header may define again; inline tables
//! and static arrays are closed; `[[array]]` appends a table to an array of tables.

use crate::names::NameIndex;
use std::borrow::Cow;
use std::ops::Range;
use toml_parser::decoder::{Encoding, ScalarKind};
use toml_parser::lexer::{Token, TokenKind};
use toml_parser::parser::EventReceiver;
use toml_parser::{ErrorSink, ParseError, Raw, Source, Span};

/// A syntax or structure error, with the byte span it concerns.
#[derive(Clone, Debug, PartialEq, Eq)]
pub(crate) struct TreeError {
    pub span: Range<usize>,
    pub message: String,
}

/// Byte span in 32 bits (design files are at most 64 MiB).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub(crate) struct Sp(u32, u32);

impl Sp {
    fn of(span: Span) -> Sp {
        Sp(clamp32(span.start()), clamp32(span.end()))
    }
    fn range(self) -> Range<usize> {
        self.0 as usize..self.1 as usize
    }
    fn join(self, end: Sp) -> Sp {
        Sp(self.0, end.1.max(self.0))
    }
}

fn clamp32(v: usize) -> u32 {
    u32::try_from(v).unwrap_or(u32::MAX)
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
struct KeyRef {
    span: Sp,
    enc: Option<Encoding>,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Val {
    Scalar { span: Sp, enc: Option<Encoding> },
    Table(u32),
    Array(u32),
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum TableKind {
    Root,
    /// Created as a prefix of a longer `[header]`; may still be defined by its own header.
    Implicit,
    /// Defined by a `[header]`.
    Header,
    /// Created by a dotted key.
    Dotted,
    /// An inline table: closed once written.
    Inline,
    /// An element of an array of tables.
    Element,
}

#[derive(Debug)]
struct TableData {
    entries: Vec<(KeyRef, Val)>,
    span: Sp,
    kind: TableKind,
    /// Whether some key holds an escape (its raw text is not its decoded text), so a look-up
    /// that the index misses must still compare decoded keys.
    escaped: bool,
    /// Key → entry index, for tables grown large enough that a linear search would cost.
    index: Option<Box<NameIndex>>,
}

#[derive(Debug)]
struct ArrayData {
    items: Vec<Val>,
    span: Sp,
    /// Made by `[[header]]`, so further `[[header]]`s may append.
    of_tables: bool,
}

/// Entries above which a table keeps a hash index of its keys.
const INDEXED: usize = 16;

/// Tokens lexed and parsed per pass; a pass ends at the next line break outside brackets.
const CHUNK_TOKENS: usize = 1 << 16;

/// Nesting of arrays and inline tables accepted (the documents here are two or three deep).
const MAX_DEPTH: usize = 64;

/// A parsed TOML document.
#[derive(Debug)]
pub(crate) struct Doc<'s> {
    src: &'s str,
    tables: Vec<TableData>,
    arrays: Vec<ArrayData>,
    /// Storage of released tables' and arrays' lists, for reuse.
    spare_entries: Vec<Vec<(KeyRef, Val)>>,
    spare_items: Vec<Vec<Val>>,
}

/// A key's text without decoding: a bare key as it is, a quoted one without its quotes.
/// That is the decoded text unless a basic string holds an escape (see [`needs_decoding`]).
fn raw_key(src: &str, k: KeyRef) -> &str {
    let raw = src.get(k.span.range()).unwrap_or("");
    match k.enc {
        None => raw,
        Some(_) => raw
            .strip_prefix(['"', '\''])
            .and_then(|r| r.strip_suffix(['"', '\'']))
            .unwrap_or(raw),
    }
}

/// Whether a key's text differs from its raw text (an escape in a quoted key).
fn needs_decoding(src: &str, k: KeyRef) -> bool {
    k.enc.is_some() && raw_key(src, k).contains('\\')
}

/// Decodes a key's text (borrowed from the source when it needs no unescaping).
fn key_text<'s>(src: &'s str, k: KeyRef) -> Cow<'s, str> {
    let r = k.span.range();
    let raw = src.get(r.clone()).unwrap_or("");
    if k.enc.is_none() {
        // A bare key is its own text (its characters were checked when it was parsed).
        return Cow::Borrowed(raw);
    }
    let mut out: Cow<'s, str> = Cow::Borrowed("");
    Raw::new_unchecked(raw, k.enc, Span::new_unchecked(r.start, r.end))
        .decode_key(&mut out, &mut ());
    out
}

/// A decoded scalar.
#[derive(Clone, Debug, PartialEq)]
pub(crate) enum Scalar<'s> {
    Str(Cow<'s, str>),
    Int(i64),
    Float(f64),
    Bool(bool),
    DateTime,
}

impl Scalar<'_> {
    /// "string", "integer", … for messages.
    pub fn type_name(&self) -> &'static str {
        match self {
            Scalar::Str(_) => "string",
            Scalar::Int(_) => "integer",
            Scalar::Float(_) => "float",
            Scalar::Bool(_) => "boolean",
            Scalar::DateTime => "date-time",
        }
    }
}

fn decode_scalar<'s>(
    src: &'s str,
    span: Sp,
    enc: Option<Encoding>,
) -> Result<Scalar<'s>, TreeError> {
    let r = span.range();
    let raw = src.get(r.clone()).unwrap_or("");
    let mut out: Cow<'s, str> = Cow::Borrowed("");
    let mut err: Option<ParseError> = None;
    let kind = Raw::new_unchecked(raw, enc, Span::new_unchecked(r.start, r.end))
        .decode_scalar(&mut out, &mut err);
    if let Some(e) = err {
        return Err(from_parse_error(&e, r));
    }
    let bad = |what: &str| TreeError {
        span: r.clone(),
        message: format!("invalid {what}"),
    };
    Ok(match kind {
        ScalarKind::String => Scalar::Str(out),
        ScalarKind::Boolean(b) => Scalar::Bool(b),
        ScalarKind::DateTime => Scalar::DateTime,
        ScalarKind::Float => Scalar::Float(out.parse().map_err(|_| bad("float"))?),
        ScalarKind::Integer(radix) => Scalar::Int(
            i64::from_str_radix(&out, radix.value()).map_err(|_| bad("integer (out of range)"))?,
        ),
    })
}

fn from_parse_error(e: &ParseError, fallback: Range<usize>) -> TreeError {
    let span = e
        .unexpected()
        .or(e.context())
        .map_or(fallback, |s| s.start()..s.end());
    let mut message = e.description().to_string();
    if let Some(expected) = e.expected() {
        let list: Vec<String> = expected
            .iter()
            .map(|x| match x {
                toml_parser::Expected::Literal(l) => format!("`{l}`"),
                toml_parser::Expected::Description(d) => (*d).to_string(),
                _ => String::new(),
            })
            .filter(|s| !s.is_empty())
            .collect();
        if !list.is_empty() {
            message = format!("{message}; expected {}", list.join(", "));
        }
    }
    TreeError { span, message }
}

/// A table of the document.
#[derive(Clone, Copy)]
pub(crate) struct Table<'d, 's> {
    doc: &'d Doc<'s>,
    id: u32,
}

/// An array of the document.
#[derive(Clone, Copy)]
pub(crate) struct Array<'d, 's> {
    doc: &'d Doc<'s>,
    id: u32,
}

/// A value of the document.
#[derive(Clone, Copy)]
pub(crate) enum Value<'d, 's> {
    Scalar {
        doc: &'d Doc<'s>,
        span: Sp,
        enc: Option<Encoding>,
    },
    Table(Table<'d, 's>),
    Array(Array<'d, 's>),
}

/// A key with its decoded text.
#[derive(Clone, Debug)]
pub(crate) struct Key<'s> {
    pub text: Cow<'s, str>,
    pub span: Range<usize>,
}

impl<'d, 's> Table<'d, 's> {
    fn data(&self) -> Option<&'d TableData> {
        self.doc.tables.get(self.id as usize)
    }
    /// Entries in the order they were defined.
    pub fn entries(&self) -> impl Iterator<Item = (Key<'s>, Value<'d, 's>)> + 'd {
        let doc = self.doc;
        self.data()
            .map(|t| t.entries.as_slice())
            .unwrap_or(&[])
            .iter()
            .map(move |&(k, v)| {
                (
                    Key {
                        text: key_text(doc.src, k),
                        span: k.span.range(),
                    },
                    doc.value(v),
                )
            })
    }
    /// Number of entries.
    pub fn len(&self) -> usize {
        self.data().map_or(0, |t| t.entries.len())
    }
    /// The span of the table (its header or its braces).
    pub fn span(&self) -> Range<usize> {
        self.data().map_or(0..0, |t| t.span.range())
    }
}

impl<'d, 's> Array<'d, 's> {
    fn data(&self) -> Option<&'d ArrayData> {
        self.doc.arrays.get(self.id as usize)
    }
    /// The items in order.
    pub fn items(&self) -> impl Iterator<Item = Value<'d, 's>> + 'd {
        let doc = self.doc;
        self.data()
            .map(|a| a.items.as_slice())
            .unwrap_or(&[])
            .iter()
            .map(move |&v| doc.value(v))
    }
    /// Number of items.
    pub fn len(&self) -> usize {
        self.data().map_or(0, |a| a.items.len())
    }
}

impl<'d, 's> Value<'d, 's> {
    /// The span of the value.
    pub fn span(&self) -> Range<usize> {
        match self {
            Value::Scalar { span, .. } => span.range(),
            Value::Table(t) => t.span(),
            Value::Array(a) => a.data().map_or(0..0, |d| d.span.range()),
        }
    }
    /// The scalar's decoded value, if it is one (decoding was checked while parsing).
    pub fn scalar(&self) -> Option<Scalar<'s>> {
        match *self {
            Value::Scalar { doc, span, enc } => {
                // A one-line string without escapes is its own text between the quotes (its
                // characters were checked when it was parsed): no decoder needed.
                if let Some(Encoding::BasicString | Encoding::LiteralString) = enc {
                    let raw = doc.src.get(span.range()).unwrap_or("");
                    let inner = raw.get(1..raw.len().saturating_sub(1));
                    if let Some(inner) = inner.filter(|i| raw.len() >= 2 && !i.contains('\\')) {
                        return Some(Scalar::Str(Cow::Borrowed(inner)));
                    }
                }
                decode_scalar(doc.src, span, enc).ok()
            }
            _ => None,
        }
    }
    /// "string", "table", "array", … for messages.
    pub fn type_name(&self) -> &'static str {
        match self {
            Value::Scalar { .. } => self.scalar().map_or("value", |s| s.type_name()),
            Value::Table(_) => "table",
            Value::Array(_) => "array",
        }
    }
}

impl<'s> Doc<'s> {
    /// The root table.
    pub fn root(&self) -> Table<'_, 's> {
        Table { doc: self, id: 0 }
    }

    fn value(&self, v: Val) -> Value<'_, 's> {
        match v {
            Val::Scalar { span, enc } => Value::Scalar {
                doc: self,
                span,
                enc,
            },
            Val::Table(id) => Value::Table(Table { doc: self, id }),
            Val::Array(id) => Value::Array(Array { doc: self, id }),
        }
    }

    fn new_table(&mut self, kind: TableKind, span: Sp) -> u32 {
        let entries = self.spare_entries.pop().unwrap_or_default();
        self.tables.push(TableData {
            entries,
            span,
            kind,
            escaped: false,
            index: None,
        });
        clamp32(self.tables.len() - 1)
    }

    fn new_array(&mut self, span: Sp, of_tables: bool) -> u32 {
        let items = self.spare_items.pop().unwrap_or_default();
        self.arrays.push(ArrayData {
            items,
            span,
            of_tables,
        });
        clamp32(self.arrays.len() - 1)
    }

    /// Drops the tables and arrays made since `mark`, keeping their lists' allocations for
    /// the next ones (a taken part's table is then made in the storage of the last one).
    fn release(&mut self, mark: (usize, usize)) {
        for t in self.tables.drain(mark.0.min(self.tables.len())..) {
            let mut e = t.entries;
            e.clear();
            self.spare_entries.push(e);
        }
        for a in self.arrays.drain(mark.1.min(self.arrays.len())..) {
            let mut i = a.items;
            i.clear();
            self.spare_items.push(i);
        }
    }

    fn find(&self, table: u32, key: &str) -> Option<usize> {
        let t = self.tables.get(table as usize)?;
        let src = self.src;
        let text = |p: u32| {
            t.entries
                .get(p as usize)
                .map_or("", |(k, _)| raw_key(src, *k))
        };
        if let Some(index) = &t.index {
            if let Some(p) = index.find(key, text) {
                return Some(p as usize);
            }
            if !t.escaped {
                return None;
            }
        }
        if t.escaped {
            t.entries.iter().position(|(k, _)| key_text(src, *k) == key)
        } else {
            t.entries.iter().position(|(k, _)| raw_key(src, *k) == key)
        }
    }

    fn insert(&mut self, table: u32, key: KeyRef, value: Val) {
        let src = self.src;
        let Some(t) = self.tables.get_mut(table as usize) else {
            return;
        };
        t.entries.push((key, value));
        t.escaped |= needs_decoding(src, key);
        let n = t.entries.len();
        if n > INDEXED {
            let entries = &t.entries;
            let text = |p: u32| {
                entries
                    .get(p as usize)
                    .map_or("", |(k, _)| raw_key(src, *k))
            };
            let index = t.index.get_or_insert_with(|| {
                let mut ix = Box::<NameIndex>::default();
                for (i, (k, _)) in entries.iter().enumerate().take(n - 1) {
                    ix.insert(raw_key(src, *k), clamp32(i), text);
                }
                ix
            });
            index.insert(raw_key(src, key), clamp32(n - 1), text);
        }
    }

    fn table_kind(&self, id: u32) -> Option<TableKind> {
        self.tables.get(id as usize).map(|t| t.kind)
    }
}

/// What a [`Consumer`] did with a value offered to it.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Offer {
    /// Taken: the value is not kept in the document, and its key is not recorded (the
    /// consumer checks its keys itself).
    Taken,
    /// Not taken: the value stays in the document.
    Kept,
    /// Stop parsing (the consumer keeps its own error).
    Stop,
}

/// Takes values while the document is parsed, so a very large table of inline tables (the
/// parts of a generated design) never needs to be held as a tree.
pub(crate) trait Consumer<'s> {
    /// Offered each inline table written as `key = { … }` directly below the `[header]`
    /// whose keys are `header`, as soon as its closing brace is read.
    fn offer(&mut self, header: &[Cow<'s, str>], key: Key<'s>, value: Table<'_, 's>) -> Offer;
}

/// A consumer that takes nothing.
#[cfg(test)]
pub(crate) struct KeepAll;

#[cfg(test)]
impl<'s> Consumer<'s> for KeepAll {
    fn offer(&mut self, _: &[Cow<'s, str>], _: Key<'s>, _: Table<'_, 's>) -> Offer {
        Offer::Kept
    }
}

/// Why parsing stopped.
#[derive(Clone, Debug, PartialEq, Eq)]
pub(crate) enum Failure {
    /// The document is not valid TOML, or not a valid arrangement of tables.
    Syntax(TreeError),
    /// The consumer asked to stop.
    Stopped,
}

/// What the parser is in the middle of.
#[derive(Debug)]
enum Frame {
    /// Key-values of a table: the current table of the document, or an inline table.
    /// `pending`: where the keys of the key-value being read sit in `Builder::pending`.
    Table {
        id: u32,
        pending: Option<(usize, usize)>,
    },
    /// Items of a static array.
    Array { id: u32 },
}

struct Builder<'s, 'c> {
    doc: Doc<'s>,
    consumer: &'c mut dyn Consumer<'s>,
    /// Keys of the last `[header]`.
    header_path: Vec<Cow<'s, str>>,
    /// Arena lengths when an inline table opened directly below a header (it and all it
    /// holds are allocated after these).
    mark: Option<(usize, usize)>,
    stopped: bool,
    /// The table key-values at the top level go to (set by headers).
    current: u32,
    frames: Vec<Frame>,
    /// Keys of the key or header being read.
    keys: Vec<KeyRef>,
    /// Keys of the key-values waiting for their values, innermost last.
    pending: Vec<KeyRef>,
    header: Option<(bool, Sp)>,
    error: Option<TreeError>,
}

impl<'s> Builder<'s, '_> {
    fn fail(&mut self, span: Sp, message: impl Into<String>) {
        self.keep_first(Some(TreeError {
            span: span.range(),
            message: message.into(),
        }));
    }

    /// Keeps `error` unless an error is already kept (the first in the document stands).
    fn keep_first(&mut self, error: Option<TreeError>) {
        if self.error.is_none() {
            self.error = error;
        }
    }

    fn path_text(&self, keys: &[KeyRef]) -> String {
        keys.iter()
            .map(|k| key_text(self.doc.src, *k).into_owned())
            .collect::<Vec<_>>()
            .join(".")
    }

    /// Walks `keys` from `start` for a header: every key must be (or become) a table that a
    /// header may pass through. Returns the table the last key names, or None after failing.
    fn descend_for_header(&mut self, keys: &[KeyRef], array: bool, span: Sp) -> Option<u32> {
        let (last, prefix) = keys.split_last()?;
        let mut at = 0u32;
        for (i, k) in prefix.iter().enumerate() {
            let name = key_text(self.doc.src, *k);
            at = match self.doc.find(at, &name) {
                None => {
                    let t = self.doc.new_table(TableKind::Implicit, span);
                    self.doc.insert(at, *k, Val::Table(t));
                    t
                }
                Some(e) => {
                    match self.doc.tables[at as usize].entries[e].1 {
                        Val::Table(t) if self.doc.table_kind(t) != Some(TableKind::Inline) => t,
                        Val::Array(a) if self.doc.arrays[a as usize].of_tables => {
                            match self.doc.arrays[a as usize].items.last() {
                                Some(Val::Table(t)) => *t,
                                _ => return None,
                            }
                        }
                        _ => {
                            let path = self.path_text(&keys[..=i]);
                            self.fail(k.span, format!("duplicate key `{name}`: `{path}` is already a value, not a table"));
                            return None;
                        }
                    }
                }
            };
        }
        let name = key_text(self.doc.src, *last);
        let path = self.path_text(keys);
        match self.doc.find(at, &name) {
            None => {
                if array {
                    let t = self.doc.new_table(TableKind::Element, span);
                    let a = self.doc.new_array(span, true);
                    if let Some(arr) = self.doc.arrays.get_mut(a as usize) {
                        arr.items.push(Val::Table(t));
                    }
                    self.doc.insert(at, *last, Val::Array(a));
                    Some(t)
                } else {
                    let t = self.doc.new_table(TableKind::Header, span);
                    self.doc.insert(at, *last, Val::Table(t));
                    Some(t)
                }
            }
            Some(e) => {
                let existing = self.doc.tables[at as usize].entries[e].1;
                match (array, existing) {
                    (false, Val::Table(t))
                        if self.doc.table_kind(t) == Some(TableKind::Implicit) =>
                    {
                        if let Some(d) = self.doc.tables.get_mut(t as usize) {
                            d.kind = TableKind::Header;
                            d.span = span;
                        }
                        Some(t)
                    }
                    (true, Val::Array(a)) if self.doc.arrays[a as usize].of_tables => {
                        let t = self.doc.new_table(TableKind::Element, span);
                        self.doc.arrays[a as usize].items.push(Val::Table(t));
                        Some(t)
                    }
                    _ => {
                        self.fail(
                            last.span,
                            format!("duplicate key `{name}`: table `{path}` is defined twice"),
                        );
                        None
                    }
                }
            }
        }
    }

    /// Inserts `value` at the dotted key path `keys` below table `table`.
    fn put(&mut self, table: u32, keys: &[KeyRef], value: Val) {
        let Some((last, prefix)) = keys.split_last() else {
            return;
        };
        let mut at = table;
        for k in prefix {
            let name = key_text(self.doc.src, *k);
            at = match self.doc.find(at, &name) {
                None => {
                    let t = self.doc.new_table(TableKind::Dotted, k.span);
                    self.doc.insert(at, *k, Val::Table(t));
                    t
                }
                Some(e) => match self.doc.tables[at as usize].entries[e].1 {
                    Val::Table(t) if self.doc.table_kind(t) == Some(TableKind::Dotted) => t,
                    _ => {
                        self.fail(k.span, format!("duplicate key `{name}`"));
                        return;
                    }
                },
            };
        }
        let name = key_text(self.doc.src, *last);
        if self.doc.find(at, &name).is_some() {
            let owner = self.table_name(at);
            self.fail(last.span, format!("duplicate key `{name}`{owner}"));
            return;
        }
        self.doc.insert(at, *last, value);
    }

    /// " in table `x`" for messages, where the table has a key of its own.
    fn table_name(&self, id: u32) -> String {
        if id == 0 {
            return String::new();
        }
        for t in &self.doc.tables {
            for (k, v) in &t.entries {
                if *v == Val::Table(id) {
                    return format!(" in table `{}`", key_text(self.doc.src, *k));
                }
            }
        }
        String::new()
    }

    /// Offers inline table `t` (key `key`, below the last header) to the consumer; when it is
    /// taken, the arenas drop everything allocated since `mark`, so they do not grow.
    fn offer(&mut self, key: KeyRef, t: u32, mark: (usize, usize)) -> bool {
        if self.error.is_some() || self.stopped {
            return false;
        }
        let k = Key {
            text: key_text(self.doc.src, key),
            span: key.span.range(),
        };
        let table = Table {
            doc: &self.doc,
            id: t,
        };
        match self.consumer.offer(&self.header_path, k, table) {
            Offer::Taken => {
                self.doc.release(mark);
                true
            }
            Offer::Kept => false,
            Offer::Stop => {
                self.stopped = true;
                false
            }
        }
    }

    /// A finished value goes to the innermost open frame.
    fn deliver(&mut self, value: Val) {
        match self.frames.last_mut() {
            Some(Frame::Array { id }) => {
                let id = *id;
                if let Some(a) = self.doc.arrays.get_mut(id as usize) {
                    a.items.push(value);
                }
            }
            Some(Frame::Table { id, pending }) => {
                let (id, Some((start, len))) = (*id, pending.take()) else {
                    return;
                };
                // Taken out and put back, so the stack keeps its allocation.
                let stack = std::mem::take(&mut self.pending);
                let keys = stack.get(start..start + len).unwrap_or(&[]);
                let mut done = false;
                if let (Val::Table(t), [key], 1) = (value, keys, self.frames.len()) {
                    if let Some(mark) = self.mark.take() {
                        done = self.offer(*key, t, mark);
                    }
                }
                if !done {
                    self.put(id, keys, value);
                }
                self.pending = stack;
                self.pending.truncate(start);
            }
            None => {}
        }
    }
}

impl<'s> EventReceiver for Builder<'s, '_> {
    fn std_table_open(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        self.keys.clear();
        self.header = Some((false, Sp::of(span)));
    }
    fn array_table_open(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        self.keys.clear();
        self.header = Some((true, Sp::of(span)));
    }
    fn std_table_close(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        self.close_header(span);
    }
    fn array_table_close(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        self.close_header(span);
    }
    fn inline_table_open(&mut self, span: Span, _e: &mut dyn ErrorSink) -> bool {
        if self.frames.len() >= MAX_DEPTH {
            self.fail(Sp::of(span), "tables and arrays nested too deeply");
            return false;
        }
        if self.frames.len() == 1 {
            self.mark = Some((self.doc.tables.len(), self.doc.arrays.len()));
        }
        let id = self.doc.new_table(TableKind::Inline, Sp::of(span));
        self.frames.push(Frame::Table { id, pending: None });
        true
    }
    fn inline_table_close(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        if let Some(Frame::Table { id, .. }) = self.frames.last() {
            let id = *id;
            if self.frames.len() > 1 {
                self.frames.pop();
                if let Some(t) = self.doc.tables.get_mut(id as usize) {
                    t.span = t.span.join(Sp::of(span));
                }
                self.deliver(Val::Table(id));
            }
        }
    }
    fn array_open(&mut self, span: Span, _e: &mut dyn ErrorSink) -> bool {
        if self.frames.len() >= MAX_DEPTH {
            self.fail(Sp::of(span), "tables and arrays nested too deeply");
            return false;
        }
        let id = self.doc.new_array(Sp::of(span), false);
        self.frames.push(Frame::Array { id });
        true
    }
    fn array_close(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        if let Some(Frame::Array { id }) = self.frames.last() {
            let id = *id;
            self.frames.pop();
            if let Some(a) = self.doc.arrays.get_mut(id as usize) {
                a.span = a.span.join(Sp::of(span));
            }
            self.deliver(Val::Array(id));
        }
    }
    fn simple_key(&mut self, span: Span, enc: Option<Encoding>, _e: &mut dyn ErrorSink) {
        self.keep_first(key_error(self.doc.src, span, enc));
        self.keys.push(KeyRef {
            span: Sp::of(span),
            enc,
        });
    }
    fn key_val_sep(&mut self, _span: Span, _e: &mut dyn ErrorSink) {
        let start = self.pending.len();
        self.pending.extend_from_slice(&self.keys);
        let len = self.keys.len();
        self.keys.clear();
        if let Some(Frame::Table { pending, .. }) = self.frames.last_mut() {
            *pending = Some((start, len));
        }
    }
    fn scalar(&mut self, span: Span, enc: Option<Encoding>, _e: &mut dyn ErrorSink) {
        self.keep_first(scalar_error(self.doc.src, span, enc));
        self.deliver(Val::Scalar {
            span: Sp::of(span),
            enc,
        });
    }
    fn comment(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        self.keep_first(comment_error(self.doc.src, span));
    }
}

/// Why a key's text is not valid TOML, if it is not.
fn key_error(src: &str, span: Span, enc: Option<Encoding>) -> Option<TreeError> {
    let raw = src.get(span.start()..span.end()).unwrap_or("");
    // A bare key of the usual characters is valid as it stands; anything else is checked by
    // the decoder.
    let plain = enc.is_none()
        && !raw.is_empty()
        && raw
            .bytes()
            .all(|c| c.is_ascii_alphanumeric() || c == b'_' || c == b'-');
    if plain {
        return None;
    }
    let mut err: Option<ParseError> = None;
    let mut out: Cow<'_, str> = Cow::Borrowed("");
    Raw::new_unchecked(raw, enc, span).decode_key(&mut out, &mut err);
    err.map(|e| from_parse_error(&e, span.start()..span.end()))
}

/// Why a scalar's text is not valid TOML, if it is not.
fn scalar_error(src: &str, span: Span, enc: Option<Encoding>) -> Option<TreeError> {
    // A one-line basic string with no escape and no control character is valid as it
    // stands (the usual value text, "10k"); anything else is checked by the decoder.
    let raw = src.get(span.start()..span.end()).unwrap_or("");
    let plain = enc == Some(Encoding::BasicString)
        && raw.len() >= 2
        && raw.ends_with('"')
        && raw
            .bytes()
            .all(|c| c != b'\\' && (c >= 0x20 && c != 0x7f || c == b'\t'));
    if plain {
        return None;
    }
    decode_scalar(src, Sp::of(span), enc).err()
}

/// Why a comment is not valid TOML, if it is not.
fn comment_error(src: &str, span: Span) -> Option<TreeError> {
    let raw = src.get(span.start()..span.end()).unwrap_or("");
    let mut err: Option<ParseError> = None;
    Raw::new_unchecked(raw, None, span).decode_comment(&mut err);
    err.map(|e| from_parse_error(&e, span.start()..span.end()))
}

impl Builder<'_, '_> {
    fn close_header(&mut self, close: Span) {
        let keys = std::mem::take(&mut self.keys);
        let Some((array, open)) = self.header.take() else {
            return;
        };
        let span = open.join(Sp::of(close));
        self.header_path = keys.iter().map(|k| key_text(self.doc.src, *k)).collect();
        if let Some(t) = self.descend_for_header(&keys, array, span) {
            self.current = t;
            self.frames.clear();
            self.frames.push(Frame::Table {
                id: t,
                pending: None,
            });
        } else if self.error.is_none() {
            self.fail(span, "invalid table header");
        }
    }
}

/// Parses a whole document. Never panics; the first error in the document is returned.
#[cfg(test)]
pub(crate) fn parse(src: &str) -> Result<Doc<'_>, TreeError> {
    parse_with(src, &mut KeepAll).map_err(|f| match f {
        Failure::Syntax(e) => e,
        Failure::Stopped => TreeError {
            span: 0..0,
            message: "stopped".into(),
        },
    })
}

/// Lexes the next chunk of whole top-level lines into `chunk`: at least [`CHUNK_TOKENS`]
/// tokens, ending at a line break outside brackets, or the rest of the source. `depth`
/// carries the bracket nesting from chunk to chunk. True when the source is exhausted.
fn next_chunk(
    lexer: &mut toml_parser::lexer::Lexer<'_>,
    chunk: &mut Vec<Token>,
    depth: &mut usize,
) -> bool {
    for t in lexer.by_ref() {
        match t.kind() {
            TokenKind::LeftSquareBracket | TokenKind::LeftCurlyBracket => *depth += 1,
            TokenKind::RightSquareBracket | TokenKind::RightCurlyBracket => {
                *depth = depth.saturating_sub(1)
            }
            _ => {}
        }
        let boundary = t.kind() == TokenKind::Newline && *depth == 0;
        chunk.push(t);
        if boundary && chunk.len() >= CHUNK_TOKENS {
            return false;
        }
    }
    true
}

/// Sources at least this long are lexed and parsed on a second thread while the events are
/// assembled into the document.
const PIPELINE_BYTES: usize = 1 << 20;

/// An event [`Builder`] acts on, recorded on the parsing thread. Keys and scalars carry
/// whether their text was found valid there (the builder then skips its own check); a
/// comment is recorded only when it is not valid, for the builder to report.
#[derive(Clone, Copy, Debug)]
enum Rec {
    StdTableOpen(Span),
    ArrayTableOpen(Span),
    StdTableClose(Span),
    ArrayTableClose(Span),
    InlineTableOpen(Span),
    InlineTableClose(Span),
    ArrayOpen(Span),
    ArrayClose(Span),
    Key(Span, Option<Encoding>, bool),
    KeyValSep(Span),
    Scalar(Span, Option<Encoding>, bool),
    BadComment(Span),
}

/// Records, on the parsing thread, the events [`Builder`] acts on, for it to replay on its
/// own thread, with the checks of key, scalar and comment text done here; answers the
/// parser's "may this be entered" as the builder would (the builder's frames are the
/// top-level table and one per open inline table or array).
struct Recorder<'s> {
    src: &'s str,
    events: Vec<Rec>,
    depth: usize,
}

impl Recorder<'_> {
    fn enter(&mut self, event: Rec) -> bool {
        self.events.push(event);
        if 1 + self.depth >= MAX_DEPTH {
            return false;
        }
        self.depth += 1;
        true
    }
}

impl EventReceiver for Recorder<'_> {
    fn std_table_open(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        self.events.push(Rec::StdTableOpen(span));
    }
    fn array_table_open(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        self.events.push(Rec::ArrayTableOpen(span));
    }
    fn std_table_close(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        self.events.push(Rec::StdTableClose(span));
        self.depth = 0;
    }
    fn array_table_close(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        self.events.push(Rec::ArrayTableClose(span));
        self.depth = 0;
    }
    fn inline_table_open(&mut self, span: Span, _e: &mut dyn ErrorSink) -> bool {
        self.enter(Rec::InlineTableOpen(span))
    }
    fn inline_table_close(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        self.events.push(Rec::InlineTableClose(span));
        self.depth = self.depth.saturating_sub(1);
    }
    fn array_open(&mut self, span: Span, _e: &mut dyn ErrorSink) -> bool {
        self.enter(Rec::ArrayOpen(span))
    }
    fn array_close(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        self.events.push(Rec::ArrayClose(span));
        self.depth = self.depth.saturating_sub(1);
    }
    fn simple_key(&mut self, span: Span, enc: Option<Encoding>, _e: &mut dyn ErrorSink) {
        let valid = key_error(self.src, span, enc).is_none();
        self.events.push(Rec::Key(span, enc, valid));
    }
    fn key_val_sep(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        self.events.push(Rec::KeyValSep(span));
    }
    fn scalar(&mut self, span: Span, enc: Option<Encoding>, _e: &mut dyn ErrorSink) {
        let valid = scalar_error(self.src, span, enc).is_none();
        self.events.push(Rec::Scalar(span, enc, valid));
    }
    fn comment(&mut self, span: Span, _e: &mut dyn ErrorSink) {
        if comment_error(self.src, span).is_some() {
            self.events.push(Rec::BadComment(span));
        }
    }
}

impl Builder<'_, '_> {
    /// Acts on recorded events as on the parser's own (a key or scalar found valid where it
    /// was recorded is taken without checking it again).
    fn replay(&mut self, events: &[Rec]) {
        let e = &mut ();
        for &ev in events {
            match ev {
                Rec::StdTableOpen(span) => self.std_table_open(span, e),
                Rec::ArrayTableOpen(span) => self.array_table_open(span, e),
                Rec::StdTableClose(span) => self.std_table_close(span, e),
                Rec::ArrayTableClose(span) => self.array_table_close(span, e),
                Rec::InlineTableOpen(span) => {
                    let _ = self.inline_table_open(span, e);
                }
                Rec::InlineTableClose(span) => self.inline_table_close(span, e),
                Rec::ArrayOpen(span) => {
                    let _ = self.array_open(span, e);
                }
                Rec::ArrayClose(span) => self.array_close(span, e),
                Rec::Key(span, enc, true) => self.keys.push(KeyRef {
                    span: Sp::of(span),
                    enc,
                }),
                Rec::Key(span, enc, false) => self.simple_key(span, enc, e),
                Rec::KeyValSep(span) => self.key_val_sep(span, e),
                Rec::Scalar(span, enc, true) => self.deliver(Val::Scalar {
                    span: Sp::of(span),
                    enc,
                }),
                Rec::Scalar(span, enc, false) => self.scalar(span, enc, e),
                Rec::BadComment(span) => self.comment(span, e),
            }
        }
    }

    /// After a chunk: keeps the earlier of the parser's first error and the builder's own;
    /// false once parsing must stop.
    fn settle(&mut self, parse_errors: &[ParseError]) -> bool {
        let end = self.doc.src.len();
        if let Some(first) = parse_errors.first() {
            let e = from_parse_error(first, end..end);
            let earlier = self
                .error
                .as_ref()
                .is_some_and(|x| x.span.start <= e.span.start);
            if !earlier {
                self.error = Some(e);
            }
        }
        self.error.is_none() && !self.stopped
    }
}

/// Parses a whole document, offering inline tables to `consumer` as they complete (see
/// [`Consumer`]). Never panics; stops at the first error in the document, or when the
/// consumer asks to.
pub(crate) fn parse_with<'s>(
    src: &'s str,
    consumer: &mut dyn Consumer<'s>,
) -> Result<Doc<'s>, Failure> {
    let pipelined = src.len() >= PIPELINE_BYTES
        && rayon::current_num_threads() > 1
        && std::thread::available_parallelism().is_ok_and(|n| n.get() > 1);
    parse_on(src, consumer, pipelined)
}

/// [`parse_with`], lexing and parsing on a second thread when `pipelined`.
fn parse_on<'s>(
    src: &'s str,
    consumer: &mut dyn Consumer<'s>,
    pipelined: bool,
) -> Result<Doc<'s>, Failure> {
    let mut b = Builder {
        consumer,
        header_path: Vec::new(),
        mark: None,
        stopped: false,
        doc: Doc {
            src,
            tables: Vec::new(),
            arrays: Vec::new(),
            spare_entries: Vec::new(),
            spare_items: Vec::new(),
        },
        current: 0,
        frames: Vec::new(),
        keys: Vec::new(),
        pending: Vec::new(),
        header: None,
        error: None,
    };
    let root = b.doc.new_table(TableKind::Root, Sp(0, 0));
    b.frames.push(Frame::Table {
        id: root,
        pending: None,
    });
    let mut lexer = Source::new(src).lex();
    let mut depth = 0;
    if pipelined {
        // Lexing and parsing on a thread of its own, a few chunks ahead of the assembly;
        // the event lists go back to it for reuse. When the assembly stops early, dropping
        // the receiver ends it.
        type Parsed = (Vec<Rec>, Vec<ParseError>);
        std::thread::scope(|scope| {
            let (to_builder, from_parser) = std::sync::mpsc::sync_channel::<Parsed>(4);
            let (to_parser, spent) = std::sync::mpsc::channel::<Parsed>();
            scope.spawn(move || {
                let mut chunk = Vec::with_capacity(CHUNK_TOKENS + 4096);
                let mut recorder = Recorder {
                    src,
                    events: Vec::new(),
                    depth: 0,
                };
                loop {
                    let (events, mut errors) = spent
                        .try_recv()
                        .unwrap_or_else(|_| (Vec::with_capacity(CHUNK_TOKENS), Vec::new()));
                    recorder.events = events;
                    recorder.events.clear();
                    errors.clear();
                    chunk.clear();
                    let end = next_chunk(&mut lexer, &mut chunk, &mut depth);
                    toml_parser::parser::parse_document(&chunk, &mut recorder, &mut errors);
                    let events = std::mem::take(&mut recorder.events);
                    let stop = !errors.is_empty();
                    if to_builder.send((events, errors)).is_err() || end || stop {
                        break;
                    }
                }
            });
            for (events, errors) in from_parser.iter() {
                b.replay(&events);
                if !b.settle(&errors) {
                    break;
                }
                let _ = to_parser.send((events, errors));
            }
            drop(from_parser);
        });
    } else {
        let mut chunk = Vec::with_capacity(CHUNK_TOKENS.min(src.len() / 4 + 16));
        let mut parse_errors: Vec<ParseError> = Vec::new();
        loop {
            chunk.clear();
            let end = next_chunk(&mut lexer, &mut chunk, &mut depth);
            toml_parser::parser::parse_document(&chunk, &mut b, &mut parse_errors);
            if !b.settle(&parse_errors) || end {
                break;
            }
        }
    }
    match (b.error, b.stopped) {
        (Some(e), _) => Err(Failure::Syntax(e)),
        (None, true) => Err(Failure::Stopped),
        (None, false) => Ok(b.doc),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn tree(src: &str) -> Result<String, String> {
        crate::design::render_tree(src)
    }

    #[test]
    fn builds_tables_arrays_and_dotted_keys() {
        let src = "title = \"t\" # note\n[sweep]\nfrom = '10 Hz'\nper_decade = 1_0\n[parts]\nR1 = { resistor = \"1k\", between = [\"a\", \"b\"] }\nx.y.z = 2.5\n[parts.R2]\nresistor = 3\n[[list]]\na = true\n[[list]]\na = false\n";
        assert_eq!(
            tree(src).unwrap(),
            "{\"list\"=[{\"a\"=true},{\"a\"=false}],\"parts\"={\"R1\"={\"between\"=[\"a\",\"b\"],\"resistor\"=\"1k\"},\"R2\"={\"resistor\"=3},\"x\"={\"y\"={\"z\"=2.5}}},\"sweep\"={\"from\"=\"10 Hz\",\"per_decade\"=10},\"title\"=\"t\"}"
        );
    }

    #[test]
    fn refuses_what_toml_refuses() {
        for (src, message) in [
            ("a = 1\na = 2\n", "duplicate key `a`"),
            (
                "[t]\nb = 1\n[t]\n",
                "duplicate key `t`: table `t` is defined twice",
            ),
            (
                "t = { a = 1 }\n[t]\n",
                "duplicate key `t`: table `t` is defined twice",
            ),
            (
                "a.b = 1\n[a]\n",
                "duplicate key `a`: table `a` is defined twice",
            ),
            (
                "a = 1\n[a.b]\n",
                "duplicate key `a`: `a` is already a value, not a table",
            ),
            (
                "[p]\nR1 = { x = 1 }\nR1 = 2\n",
                "duplicate key `R1` in table `p`",
            ),
            ("a = [1\n", "unclosed array; expected `]`"),
        ] {
            let e = tree(src).unwrap_err();
            assert!(e.starts_with(message), "{src:?}: {e:?}");
        }
        // A header may define a table a longer header created implicitly.
        assert_eq!(
            tree("[a.b]\nx = 1\n[a]\ny = 2\n").unwrap(),
            "{\"a\"={\"b\"={\"x\"=1},\"y\"=2}}"
        );
    }

    #[test]
    fn strings_read_without_the_decoder_are_what_it_decodes() {
        // toml_parser's decoder is the reference for every string form.
        let src = r#"a = "10 k\u03a9"
b = "1 kΩ"
c = 'C:\x'
d = ""
e = ''
f = """
x"""
g = "tab\there	and a tab"
h = "a\\b"
"#;
        let d = parse(src).unwrap();
        let mut n = 0;
        for (k, v) in d.root().entries() {
            let Value::Scalar { doc, span, enc } = v else {
                panic!("{}", k.text)
            };
            let decoded = decode_scalar(doc.src, span, enc).unwrap();
            assert_eq!(v.scalar(), Some(decoded), "{}", k.text);
            n += 1;
        }
        assert_eq!(n, 8);
        let Some(Scalar::Str(b)) = d.root().entries().nth(1).map(|(_, v)| v.scalar().unwrap())
        else {
            panic!()
        };
        assert!(matches!(b, Cow::Borrowed("1 kΩ")));
    }

    /// Takes the parts below `[parts]` whose number is even, and stops at `stop`.
    struct TakeEven {
        stop: &'static str,
        taken: Vec<String>,
    }

    impl<'s> Consumer<'s> for TakeEven {
        fn offer(&mut self, header: &[Cow<'s, str>], key: Key<'s>, value: Table<'_, 's>) -> Offer {
            if key.text == self.stop {
                return Offer::Stop;
            }
            let even = key.text[1..].parse::<usize>().is_ok_and(|k| k % 2 == 0);
            if header != [Cow::Borrowed("parts")] || !even {
                return Offer::Kept;
            }
            self.taken
                .push(format!("{}{:?}{}", key.text, key.span, value.len()));
            Offer::Taken
        }
    }

    /// Parsing on a second thread (events recorded there, replayed here) gives the very
    /// document, the very offers and the very first error of parsing in one thread, over
    /// many chunks, with errors of the parser and of the assembly early, late and at depth.
    #[test]
    fn a_second_thread_changes_nothing() {
        let mut big = String::from("title = \"t\" # c\n[parts]\n");
        for k in 0..12000 {
            big += &format!("R{k} = {{ resistor = \"{k}\", between = [\"a\",\n 'b'] }} # n\n");
        }
        let deep = format!("{}{}", "x = ".to_string() + &"[".repeat(70), "]".repeat(70));
        let cases = [
            big.clone(),
            format!("{big}[sweep]\nfrom = 1\n"),
            format!("{big}R17 = 2\n"),
            format!("{big}R18 = {{ a = 1 }}\n"),
            format!("{big}x = [1,\n"),
            format!("{big}{deep}\n"),
            format!("{deep}\n{big}"),
            format!("a = 1\na = 2\n{big}"),
            big.replace("R9000 =", "R9000 = = "),
            big.replace("R11999 = {", "'R11999' = { \"a\\u0009b\" = 1,"),
            big.replace("# n\n", "# n\u{7f}\n"),
            big.replace("R10500 = {", "R10500 = { \"k\\q\" = 1,"),
            big.replace("resistor = \"10600\"", "resistor = \"10\\q600\""),
            big.replace("resistor = \"10601\"", "resistor = 99999999999999999999"),
        ];
        for (i, src) in cases.iter().enumerate() {
            for stop in ["none", "R7001"] {
                let run = |pipelined: bool| {
                    let mut c = TakeEven {
                        stop,
                        taken: Vec::new(),
                    };
                    let doc =
                        parse_on(src, &mut c, pipelined).map(|d| format!("{:?}", d.root().len()));
                    let tree = match parse_on(src, &mut KeepAll, pipelined) {
                        Ok(d) => format!("{:?} {:?}", d.tables, d.arrays),
                        Err(e) => format!("{e:?}"),
                    };
                    (doc, c.taken, tree)
                };
                let (one, two) = (run(false), run(true));
                assert_eq!(one.0, two.0, "case {i}, stop {stop}");
                assert_eq!(one.1, two.1, "case {i}, stop {stop}");
                assert!(one.2 == two.2, "case {i}, stop {stop}");
            }
        }
        // The cases do reach the errors they were written for.
        assert!(
            format!("{:?}", parse_on(&cases[5], &mut KeepAll, true)).contains("nested too deeply")
        );
        assert!(format!("{:?}", parse_on(&cases[2], &mut KeepAll, true))
            .contains("duplicate key `R17`"));
        // A bad comment, key, string and integer, each found where it is.
        for (bad, at) in cases[10..]
            .iter()
            .zip(["R0 ", "R10500 ", "R10600 ", "R10601 "])
        {
            let Err(Failure::Syntax(e)) = parse_on(bad, &mut KeepAll, true) else {
                panic!("{at}")
            };
            // The error lies in that part's entry (up to the next part's name).
            let start = bad.find(&format!("\n{at}")).unwrap();
            let end = start + 1 + bad[start + 1..].find("\nR").unwrap();
            assert!((start..end).contains(&e.span.start), "{at}: {e:?}");
        }
    }

    #[test]
    fn chunks_split_only_between_whole_lines() {
        // More tokens than one chunk, with a multi-line array spanning a chunk boundary.
        let mut src = String::from("[parts]\n");
        for k in 0..9000 {
            src += &format!("R{k} = {{ resistor = {k}, between = [\"a\",\n \"b\"] }}\n");
        }
        let d = parse(&src).unwrap();
        let parts = d.root().entries().next().unwrap().1;
        let Value::Table(t) = parts else { panic!() };
        assert_eq!(t.len(), 9000);
        let last = t.entries().last().unwrap();
        assert_eq!(last.0.text, "R8999");
        let Value::Table(last) = last.1 else { panic!() };
        assert_eq!(last.entries().count(), 2);
        // Duplicates are found in a large (indexed) table too, however the key is quoted.
        for dup in ["R17 = 1\n", "'R17' = 1\n", "\"R\\u0031\\u0037\" = 1\n"] {
            let e = parse(&format!("{src}{dup}")).unwrap_err();
            assert!(e.message.starts_with("duplicate key `R17`"), "{dup}: {e:?}");
        }
        let escaped = format!("{src}\"a\\tb\" = 1\n\"a\\u0009b\" = 2\n");
        assert!(parse(&escaped)
            .unwrap_err()
            .message
            .starts_with("duplicate key `a\tb`"));
    }
}
