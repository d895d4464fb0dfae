//! A pickle interpreter that executes nothing, for the `data.pkl` of the tensor framework's zip
//! checkpoints.
//!
//! [`parse()`] turns the byte stream into an arena of inert [`Node`]s; [`write()`] turns an arena
//! back into a pickle. Nothing named in the stream is ever imported, called or built: a global is
//! a [`Node::Global`] reference, and a call of anything but the recognised rebuild functions
//! becomes a [`Node::Opaque`] record of the call that is carried through unchanged.
//!
//! # What is accepted
//! * Plain-data opcodes of protocols 0 to 5 (numbers, strings, bytes, containers, memo, mark,
//!   frame, proto, stop), including the text forms `INT`, `LONG`, `FLOAT`, `STRING`, `UNICODE`,
//!   `DICT`, `LIST`, `TUPLE`, `PUT`, `GET`. Text numbers are decimal only and at most 4300 digits
//!   (the limit CPython itself applies to decimal integer text since 3.11).
//! * `GLOBAL`/`STACK_GLOBAL` make a [`Node::Global`].
//! * `REDUCE` of `collections.OrderedDict` with `()` makes an ordered [`Node::Dict`];
//!   `torch._utils._rebuild_tensor_v2`, `_rebuild_parameter` and `_rebuild_parameter_with_state`
//!   make [`Node::Tensor`] / [`Node::Parameter`] and their arguments are checked strictly; any
//!   other `REDUCE`/`NEWOBJ`/`NEWOBJ_EX` makes a [`Node::Opaque`]. `BUILD`, `SETITEM(S)` and
//!   `APPEND(S)` on an opaque object are recorded on it in order.
//! * `BINPERSID` only of `('storage', torch.<X>Storage, key, location, numel)`.
//!
//! `INST`, `OBJ`, `EXT1/2/4`, `PERSID`, `NEXT_BUFFER`, `READONLY_BUFFER` and unknown bytes are
//! refused, and so are: values or marks left at `STOP`, bytes after `STOP`, `BUILD` on anything
//! but an opaque object or ordered dict (or twice on one), text that is not UTF-8 (including
//! lone surrogates), and global names holding a newline. Python 2 strings (`STRING`,
//! `BINSTRING`, `SHORT_BINSTRING`) become `str` when they are UTF-8, else bytes. Every length is checked against the bytes left before anything is allocated; node
//! count, stack and mark depth, memo size and nesting depth are bounded by [`Limits`]. Nesting is
//! measured once the stream is read, by a depth-first walk from the root; no traversal here
//! recurses, so depth costs no call stack.
//!
//! Shared references keep Python's meaning: a value is one node however often it is referenced,
//! so a memoized dict filled later is the same dict everywhere. Later values for an equal key of
//! type `str`, `int`, `bool` or `None` replace the earlier value in place, as in a Python dict.
//!
//! # Tensor names
//! [`Pickle::tensors`] names each tensor by the path of keys from the root, joined by `/`:
//! * a `str` key as itself, with `%` written `%25` and `/` written `%2F`;
//! * a list, tuple or set element by its decimal index;
//! * other keys as `%{int N}`, `%{true}`, `%{false}`, `%{none}`, or `%{key N}` (N = position of
//!   the item in its dict) for keys of any other type;
//! * inside an opaque object: `%{args}`, `%{kwargs}`, `%{state}` (also the `BUILD` state of an
//!   ordered dict), items by key, appended elements by index — or `%{append N}` when the object
//!   also holds keyed items.
//!
//! `%{` never comes from an escaped `str` key, so names are unambiguous. A root that is a dict
//! of tensors gives the bare keys. A tensor reachable by several paths is named once, by the first
//! path in depth-first order; a parameter is named, not the tensor inside it.
//!
//! # Writing
//! [`write()`] emits protocol 2 as Python's pickler does: nodes referenced more than once are
//! memoized (except numbers, `None` and bools, which Python never memoizes), mutable containers
//! are created empty, memoized, then filled, recursive tuples are resolved with `POP` or
//! `POP_MARK` and a `GET`, storages are re-emitted as the persistent-id tuple at every reference,
//! and no `FRAME` is written. An opaque object is re-emitted as its call, then its appends, items
//! and state. Values protocol 2 cannot state directly (`bytes`, `set`, `frozenset`, `bytearray`
//! nodes, which only come from streams of a later protocol) use that protocol's opcode and the
//! header names it.

use std::collections::HashMap;
use std::fmt;

/// Index of a node in [`Pickle::nodes`].
pub type NodeId = usize;

/// A `str` key as it appears in a tensor name: `%` written `%25`, `/` written `%2F`.
pub fn escape_key(key: &str) -> String {
    key.replace('%', "%25").replace('/', "%2F")
}

/// The key an escaped name part stands for (the inverse of [`escape_key`]).
pub fn unescape_key(part: &str) -> String {
    let mut out = String::with_capacity(part.len());
    let mut rest = part;
    while let Some(i) = rest.find('%') {
        out.push_str(&rest[..i]);
        let tail = &rest[i..];
        let (plain, skip) = match tail.get(..3) {
            Some("%25") => ('%', 3),
            Some("%2F") => ('/', 3),
            _ => ('%', 1),
        };
        out.push(plain);
        rest = &tail[skip..];
    }
    out.push_str(rest);
    out
}

/// CPython's default recursion limit: its pickler cannot write nesting deeper than this.
const PYTHON_RECURSION_LIMIT: usize = 1000;
/// CPython (3.11+) refuses decimal integer text longer than this (`sys.int_info`).
const MAX_DECIMAL_DIGITS: usize = 4300;
/// Python's pickler fills containers in batches of this many items.
const BATCH: usize = 1000;

/// Bounds on what one stream may build.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Limits {
    /// Most nodes in the arena.
    pub max_nodes: usize,
    /// Most values on the stack, and most open marks.
    pub max_stack: usize,
    /// Most memo entries.
    pub max_memo: usize,
    /// Deepest nesting below the root.
    pub max_depth: usize,
}

impl Limits {
    /// Bounds for a stream of `pickle_len` bytes. Every opcode is at least one byte and makes at
    /// most one node, one stack value and one memo entry, so a legitimate stream always fits.
    pub fn for_len(pickle_len: usize) -> Self {
        let per_opcode = pickle_len.saturating_add(1);
        Limits {
            max_nodes: per_opcode,
            max_stack: per_opcode,
            max_memo: per_opcode,
            max_depth: PYTHON_RECURSION_LIMIT,
        }
    }
}

/// How an opaque object was made.
#[derive(Debug, Clone, PartialEq)]
pub enum Build {
    /// `callable(*args)`.
    Reduce,
    /// `cls.__new__(cls, *args)`.
    NewObj,
    /// `cls.__new__(cls, *args, **kwargs)`.
    NewObjEx { kwargs: NodeId },
}

/// One inert value.
#[derive(Debug, Clone, PartialEq)]
pub enum Node {
    None,
    Bool(bool),
    Int(i64),
    /// Little-endian two's complement bytes of an integer that does not fit `i64`.
    BigInt(Vec<u8>),
    Float(f64),
    Str(String),
    Bytes(Vec<u8>),
    ByteArray(Vec<u8>),
    Tuple(Vec<NodeId>),
    List(Vec<NodeId>),
    Dict {
        items: Vec<(NodeId, NodeId)>,
        /// A `collections.OrderedDict`.
        ordered: bool,
        /// `BUILD` state (an ordered dict's attributes, e.g. `_metadata`).
        state: Option<NodeId>,
    },
    Set(Vec<NodeId>),
    FrozenSet(Vec<NodeId>),
    /// A reference to a module attribute, never resolved.
    Global {
        module: String,
        name: String,
    },
    /// A storage record named by a persistent id.
    Storage {
        /// Class name in module `torch`, e.g. `FloatStorage`.
        class: String,
        key: String,
        location: String,
        numel: u64,
    },
    /// `torch._utils._rebuild_tensor_v2(storage, offset, size, stride, requires_grad, hooks, ...)`.
    Tensor {
        storage: NodeId,
        offset: u64,
        size: Vec<u64>,
        stride: Vec<u64>,
        requires_grad: bool,
        hooks: NodeId,
        /// The element type global (`torch.uint16`, ...) of `_rebuild_tensor_v3`, which newer
        /// framework versions use for tensors on untyped storages; `None` for v2.
        dtype: Option<NodeId>,
        /// Further arguments (metadata), kept.
        extra: Vec<NodeId>,
    },
    /// `torch._utils._rebuild_parameter(data, requires_grad, hooks)`, or
    /// `_rebuild_parameter_with_state` with its state as the one `extra` argument.
    Parameter {
        data: NodeId,
        requires_grad: bool,
        hooks: NodeId,
        extra: Vec<NodeId>,
    },
    /// A call that was not made, kept with everything later done to its result.
    Opaque {
        callable: NodeId,
        args: NodeId,
        how: Build,
        state: Option<NodeId>,
        items: Vec<(NodeId, NodeId)>,
        appends: Vec<NodeId>,
    },
}

/// A parsed pickle: an arena of nodes and the value the stream returns.
#[derive(Debug, Clone, PartialEq)]
pub struct Pickle {
    pub nodes: Vec<Node>,
    pub root: NodeId,
    /// Protocol named by the stream's `PROTO` opcode (0 when absent).
    pub protocol: u8,
}

/// The rule a stream broke.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Rule {
    /// An argument or length runs past the end of the stream.
    Truncated {
        wanted: u64,
        left: usize,
    },
    /// The stream ends without `STOP`.
    NoStop,
    /// Bytes follow `STOP`.
    TrailingBytes(usize),
    /// An opcode outside the allow-list.
    Refused,
    /// A byte that is no pickle opcode.
    Unknown,
    /// `PROTO` names a protocol above 5.
    Protocol(u8),
    /// An opcode needs more values than the stack holds above the last mark.
    StackUnderflow,
    /// An opcode needs a mark and none is open.
    NoMark,
    /// `STOP` with values or marks left over.
    Leftover {
        values: usize,
        marks: usize,
    },
    /// `GET` of a key never `PUT`.
    MemoMissing(u64),
    TooManyMemo(usize),
    TooManyNodes(usize),
    StackTooDeep(usize),
    TooDeep(usize),
    /// A text argument that does not read as its opcode requires.
    BadText(&'static str),
    /// Text that is not UTF-8 (or holds a lone surrogate).
    BadUtf8,
    NegativeLength,
    /// The opcode cannot apply to this kind of value.
    WrongTarget(&'static str),
    /// A mark holds an odd number of values where key-value pairs are needed.
    OddItems,
    /// A persistent id other than a storage tuple.
    BadPersistentId(&'static str),
    /// A rebuild function called with arguments it does not take.
    BadRebuild {
        function: &'static str,
        reason: String,
    },
    /// A call whose arguments are not what Python requires.
    BadCall(&'static str),
    /// `BUILD` applied twice to one object.
    SecondBuild,
    /// A global name holding a newline (it could not be written back).
    NewlineInGlobal,
}

impl fmt::Display for Rule {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Rule::Truncated { wanted, left } => {
                write!(f, "needs {wanted} bytes but only {left} are left")
            }
            Rule::NoStop => write!(f, "stream ends without STOP"),
            Rule::TrailingBytes(n) => write!(f, "{n} bytes follow STOP"),
            Rule::Refused => write!(
                f,
                "opcode is not allowed (it could run code or needs outside data)"
            ),
            Rule::Unknown => write!(f, "not a pickle opcode"),
            Rule::Protocol(p) => write!(f, "protocol {p} is above 5"),
            Rule::StackUnderflow => write!(f, "stack underflow"),
            Rule::NoMark => write!(f, "no open MARK"),
            Rule::Leftover { values, marks } => {
                write!(
                    f,
                    "{values} values and {marks} marks left on the stack at STOP"
                )
            }
            Rule::MemoMissing(k) => write!(f, "memo key {k} was never stored"),
            Rule::TooManyMemo(n) => write!(f, "more than {n} memo entries"),
            Rule::TooManyNodes(n) => write!(f, "more than {n} values"),
            Rule::StackTooDeep(n) => write!(f, "stack or marks deeper than {n}"),
            Rule::TooDeep(n) => write!(f, "values nested deeper than {n}"),
            Rule::BadText(what) => write!(f, "malformed text argument: {what}"),
            Rule::BadUtf8 => write!(f, "text is not valid UTF-8"),
            Rule::NegativeLength => write!(f, "negative length"),
            Rule::WrongTarget(what) => write!(f, "cannot apply to {what}"),
            Rule::OddItems => write!(f, "odd number of values for key-value pairs"),
            Rule::BadPersistentId(why) => write!(f, "persistent id is not a storage: {why}"),
            Rule::BadRebuild { function, reason } => write!(f, "{function}: {reason}"),
            Rule::BadCall(why) => write!(f, "{why}"),
            Rule::SecondBuild => write!(f, "BUILD applied twice to one object"),
            Rule::NewlineInGlobal => write!(f, "global name holds a newline"),
        }
    }
}

/// Why a stream was refused, where, and at which opcode.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PickleError {
    /// Byte offset of the opcode (the stream length for [`Rule::NoStop`]).
    pub offset: usize,
    /// Opcode name as in Python's `pickletools`, or its hex value when unknown.
    pub opcode: String,
    pub rule: Rule,
}

impl fmt::Display for PickleError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "pickle byte {} ({}): {}",
            self.offset, self.opcode, self.rule
        )
    }
}

impl std::error::Error for PickleError {}

type Result<T> = std::result::Result<T, PickleError>;

/// Opcode names from Python's `pickletools`.
fn opcode_name(op: u8) -> Option<&'static str> {
    Some(match op {
        b'(' => "MARK",
        b'.' => "STOP",
        b'0' => "POP",
        b'1' => "POP_MARK",
        b'2' => "DUP",
        b'F' => "FLOAT",
        b'I' => "INT",
        b'J' => "BININT",
        b'K' => "BININT1",
        b'L' => "LONG",
        b'M' => "BININT2",
        b'N' => "NONE",
        b'P' => "PERSID",
        b'Q' => "BINPERSID",
        b'R' => "REDUCE",
        b'S' => "STRING",
        b'T' => "BINSTRING",
        b'U' => "SHORT_BINSTRING",
        b'V' => "UNICODE",
        b'X' => "BINUNICODE",
        b'a' => "APPEND",
        b'b' => "BUILD",
        b'c' => "GLOBAL",
        b'd' => "DICT",
        b'}' => "EMPTY_DICT",
        b'e' => "APPENDS",
        b'g' => "GET",
        b'h' => "BINGET",
        b'i' => "INST",
        b'j' => "LONG_BINGET",
        b'l' => "LIST",
        b']' => "EMPTY_LIST",
        b'o' => "OBJ",
        b'p' => "PUT",
        b'q' => "BINPUT",
        b'r' => "LONG_BINPUT",
        b's' => "SETITEM",
        b't' => "TUPLE",
        b')' => "EMPTY_TUPLE",
        b'u' => "SETITEMS",
        b'G' => "BINFLOAT",
        0x80 => "PROTO",
        0x81 => "NEWOBJ",
        0x82 => "EXT1",
        0x83 => "EXT2",
        0x84 => "EXT4",
        0x85 => "TUPLE1",
        0x86 => "TUPLE2",
        0x87 => "TUPLE3",
        0x88 => "NEWTRUE",
        0x89 => "NEWFALSE",
        0x8a => "LONG1",
        0x8b => "LONG4",
        b'B' => "BINBYTES",
        b'C' => "SHORT_BINBYTES",
        0x8c => "SHORT_BINUNICODE",
        0x8d => "BINUNICODE8",
        0x8e => "BINBYTES8",
        0x8f => "EMPTY_SET",
        0x90 => "ADDITEMS",
        0x91 => "FROZENSET",
        0x92 => "NEWOBJ_EX",
        0x93 => "STACK_GLOBAL",
        0x94 => "MEMOIZE",
        0x95 => "FRAME",
        0x96 => "BYTEARRAY8",
        0x97 => "NEXT_BUFFER",
        0x98 => "READONLY_BUFFER",
        _ => return None,
    })
}

/// Parses a pickle stream into an arena of inert nodes.
pub fn parse(bytes: &[u8], limits: &Limits) -> Result<Pickle> {
    Parser::new(bytes, limits).run()
}

/// A dict key whose equality Python decides by value, for replacing values of repeated keys.
#[derive(Hash, PartialEq, Eq)]
enum KeyValue {
    Str(String),
    Int(i64),
    None,
}

fn key_value(node: &Node) -> Option<KeyValue> {
    match node {
        Node::Str(s) => Some(KeyValue::Str(s.clone())),
        Node::Int(i) => Some(KeyValue::Int(*i)),
        Node::Bool(b) => Some(KeyValue::Int(i64::from(*b))),
        Node::None => Some(KeyValue::None),
        _ => None,
    }
}

fn kind(node: &Node) -> &'static str {
    match node {
        Node::None => "None",
        Node::Bool(_) => "a bool",
        Node::Int(_) | Node::BigInt(_) => "an int",
        Node::Float(_) => "a float",
        Node::Str(_) => "a str",
        Node::Bytes(_) => "bytes",
        Node::ByteArray(_) => "a bytearray",
        Node::Tuple(_) => "a tuple",
        Node::List(_) => "a list",
        Node::Dict { .. } => "a dict",
        Node::Set(_) => "a set",
        Node::FrozenSet(_) => "a frozenset",
        Node::Global { .. } => "a global",
        Node::Storage { .. } => "a storage",
        Node::Tensor { .. } => "a tensor",
        Node::Parameter { .. } => "a parameter",
        Node::Opaque { .. } => "an opaque object",
    }
}

struct Parser<'a> {
    bytes: &'a [u8],
    pos: usize,
    op_at: usize,
    op: u8,
    limits: &'a Limits,
    nodes: Vec<Node>,
    stack: Vec<NodeId>,
    marks: Vec<usize>,
    memo: HashMap<u64, NodeId>,
    dict_keys: HashMap<NodeId, HashMap<KeyValue, usize>>,
    protocol: u8,
}

impl<'a> Parser<'a> {
    fn new(bytes: &'a [u8], limits: &'a Limits) -> Self {
        Parser {
            bytes,
            pos: 0,
            op_at: 0,
            op: 0,
            limits,
            nodes: Vec::new(),
            stack: Vec::new(),
            marks: Vec::new(),
            memo: HashMap::new(),
            dict_keys: HashMap::new(),
            protocol: 0,
        }
    }

    fn err(&self, rule: Rule) -> PickleError {
        let opcode = match opcode_name(self.op) {
            Some(name) => name.to_string(),
            None => format!("0x{:02x}", self.op),
        };
        PickleError {
            offset: self.op_at,
            opcode,
            rule,
        }
    }

    fn run(mut self) -> Result<Pickle> {
        loop {
            if self.pos >= self.bytes.len() {
                return Err(PickleError {
                    offset: self.bytes.len(),
                    opcode: "end of data".into(),
                    rule: Rule::NoStop,
                });
            }
            self.op_at = self.pos;
            self.op = self.bytes[self.pos];
            self.pos += 1;
            if self.op == b'.' {
                return self.stop();
            }
            self.step()?;
        }
    }

    fn stop(mut self) -> Result<Pickle> {
        let root = self.pop()?;
        if !self.stack.is_empty() || !self.marks.is_empty() {
            let (values, marks) = (self.stack.len(), self.marks.len());
            return Err(self.err(Rule::Leftover { values, marks }));
        }
        if self.pos != self.bytes.len() {
            return Err(self.err(Rule::TrailingBytes(self.bytes.len() - self.pos)));
        }
        let pickle = Pickle {
            nodes: std::mem::take(&mut self.nodes),
            root,
            protocol: self.protocol,
        };
        if pickle.depth_exceeds(self.limits.max_depth) {
            return Err(self.err(Rule::TooDeep(self.limits.max_depth)));
        }
        Ok(pickle)
    }

    fn step(&mut self) -> Result<()> {
        match self.op {
            b'(' => self.mark(),
            b'0' => self.pop_any(),
            b'1' => self.pop_mark().map(drop),
            b'2' => {
                let top = self.top()?;
                self.push(top)
            }
            b'N' => self.push_new(Node::None),
            0x88 => self.push_new(Node::Bool(true)),
            0x89 => self.push_new(Node::Bool(false)),
            b'I' => self.text_int(),
            b'L' => self.text_long(),
            b'F' => self.text_float(),
            b'J' => {
                let v = i32::from_le_bytes(self.array()?);
                self.push_new(Node::Int(v.into()))
            }
            b'K' => {
                let v = self.array::<1>()?[0];
                self.push_new(Node::Int(v.into()))
            }
            b'M' => {
                let v = u16::from_le_bytes(self.array()?);
                self.push_new(Node::Int(v.into()))
            }
            0x8a => {
                let n = self.array::<1>()?[0];
                self.binary_long(n.into())
            }
            0x8b => {
                let n = self.signed_len()?;
                self.binary_long(n)
            }
            b'G' => {
                let v = f64::from_be_bytes(self.array()?);
                self.push_new(Node::Float(v))
            }
            b'S' => self.text_string(),
            b'T' => {
                let n = self.signed_len()?;
                self.legacy_string(n)
            }
            b'U' => {
                let n = self.array::<1>()?[0];
                self.legacy_string(n.into())
            }
            b'V' => self.text_unicode(),
            b'X' => {
                let n = u32::from_le_bytes(self.array()?);
                self.unicode(n.into())
            }
            0x8c => {
                let n = self.array::<1>()?[0];
                self.unicode(n.into())
            }
            0x8d => {
                let n = u64::from_le_bytes(self.array()?);
                self.unicode(n)
            }
            b'B' => {
                let n = u32::from_le_bytes(self.array()?);
                self.bytes_node(n.into(), false)
            }
            b'C' => {
                let n = self.array::<1>()?[0];
                self.bytes_node(n.into(), false)
            }
            0x8e => {
                let n = u64::from_le_bytes(self.array()?);
                self.bytes_node(n, false)
            }
            0x96 => {
                let n = u64::from_le_bytes(self.array()?);
                self.bytes_node(n, true)
            }
            b')' => self.push_new(Node::Tuple(Vec::new())),
            b't' => {
                let items = self.pop_mark()?;
                self.push_new(Node::Tuple(items))
            }
            0x85..=0x87 => self.small_tuple(usize::from(self.op - 0x84)),
            b']' => self.push_new(Node::List(Vec::new())),
            b'l' => {
                let items = self.pop_mark()?;
                self.push_new(Node::List(items))
            }
            b'a' => {
                let value = self.pop()?;
                let target = self.top()?;
                self.append(target, &[value])
            }
            b'e' => {
                let values = self.pop_mark()?;
                let target = self.top()?;
                self.append(target, &values)
            }
            b'}' => self.push_new(Node::Dict {
                items: Vec::new(),
                ordered: false,
                state: None,
            }),
            b'd' => self.dict_from_mark(),
            b's' => {
                let value = self.pop()?;
                let key = self.pop()?;
                let target = self.top()?;
                self.set_item(target, key, value)
            }
            b'u' => {
                let values = self.pop_mark()?;
                let target = self.top()?;
                self.set_items(target, &values)
            }
            0x8f => self.push_new(Node::Set(Vec::new())),
            0x90 => self.add_items(),
            0x91 => {
                let items = self.pop_mark()?;
                self.push_new(Node::FrozenSet(items))
            }
            b'p' => {
                let key = self.text_decimal("PUT key")?;
                self.put(key)
            }
            b'q' => {
                let key = self.array::<1>()?[0];
                self.put(key.into())
            }
            b'r' => {
                let key = u32::from_le_bytes(self.array()?);
                self.put(key.into())
            }
            0x94 => self.put(self.memo.len() as u64),
            b'g' => {
                let key = self.text_decimal("GET key")?;
                self.get(key)
            }
            b'h' => {
                let key = self.array::<1>()?[0];
                self.get(key.into())
            }
            b'j' => {
                let key = u32::from_le_bytes(self.array()?);
                self.get(key.into())
            }
            b'c' => self.text_global(),
            0x93 => self.stack_global(),
            b'R' => {
                let args = self.pop()?;
                let callable = self.pop()?;
                self.call(callable, args, Build::Reduce)
            }
            0x81 => {
                let args = self.pop()?;
                let class = self.pop()?;
                self.call(class, args, Build::NewObj)
            }
            0x92 => {
                let kwargs = self.pop()?;
                let args = self.pop()?;
                let class = self.pop()?;
                self.call(class, args, Build::NewObjEx { kwargs })
            }
            b'b' => self.build(),
            b'Q' => self.persistent_storage(),
            0x80 => {
                let proto = self.array::<1>()?[0];
                if proto > 5 {
                    return Err(self.err(Rule::Protocol(proto)));
                }
                self.protocol = proto;
                Ok(())
            }
            0x95 => {
                // Frames only group opcodes; their content is read like any other bytes.
                let n = u64::from_le_bytes(self.array()?);
                self.check_left(n).map(drop)
            }
            op if opcode_name(op).is_some() => Err(self.err(Rule::Refused)),
            _ => Err(self.err(Rule::Unknown)),
        }
    }

    // ---- reading arguments ----

    fn check_left(&self, n: u64) -> Result<usize> {
        let left = self.bytes.len() - self.pos;
        match usize::try_from(n) {
            Ok(n) if n <= left => Ok(n),
            _ => Err(self.err(Rule::Truncated { wanted: n, left })),
        }
    }

    fn take(&mut self, n: u64) -> Result<&'a [u8]> {
        let n = self.check_left(n)?;
        let out = &self.bytes[self.pos..self.pos + n];
        self.pos += n;
        Ok(out)
    }

    fn array<const N: usize>(&mut self) -> Result<[u8; N]> {
        let slice = self.take(N as u64)?;
        Ok(slice.try_into().expect("take returns N bytes"))
    }

    fn signed_len(&mut self) -> Result<u64> {
        let n = i32::from_le_bytes(self.array()?);
        u64::try_from(n).map_err(|_| self.err(Rule::NegativeLength))
    }

    /// One text line without its newline.
    fn line(&mut self) -> Result<&'a [u8]> {
        let rest = &self.bytes[self.pos..];
        match rest.iter().position(|&b| b == b'\n') {
            Some(end) => {
                self.pos += end + 1;
                Ok(&rest[..end])
            }
            None => Err(self.err(Rule::Truncated {
                wanted: rest.len() as u64 + 1,
                left: rest.len(),
            })),
        }
    }

    fn text_decimal(&mut self, what: &'static str) -> Result<u64> {
        let line = self.line()?;
        std::str::from_utf8(line)
            .ok()
            .and_then(|s| s.trim().parse::<u64>().ok())
            .ok_or_else(|| self.err(Rule::BadText(what)))
    }

    // ---- stack, marks, memo, nodes ----

    fn fence(&self) -> usize {
        self.marks.last().copied().unwrap_or(0)
    }

    fn new_node(&mut self, node: Node) -> Result<NodeId> {
        if self.nodes.len() >= self.limits.max_nodes {
            return Err(self.err(Rule::TooManyNodes(self.limits.max_nodes)));
        }
        self.nodes.push(node);
        Ok(self.nodes.len() - 1)
    }

    fn push(&mut self, id: NodeId) -> Result<()> {
        if self.stack.len() >= self.limits.max_stack {
            return Err(self.err(Rule::StackTooDeep(self.limits.max_stack)));
        }
        self.stack.push(id);
        Ok(())
    }

    fn push_new(&mut self, node: Node) -> Result<()> {
        let id = self.new_node(node)?;
        self.push(id)
    }

    fn pop(&mut self) -> Result<NodeId> {
        if self.stack.len() <= self.fence() {
            return Err(self.err(Rule::StackUnderflow));
        }
        Ok(self.stack.pop().expect("stack above the fence"))
    }

    fn top(&self) -> Result<NodeId> {
        if self.stack.len() <= self.fence() {
            return Err(self.err(Rule::StackUnderflow));
        }
        Ok(*self.stack.last().expect("stack above the fence"))
    }

    fn mark(&mut self) -> Result<()> {
        if self.marks.len() >= self.limits.max_stack {
            return Err(self.err(Rule::StackTooDeep(self.limits.max_stack)));
        }
        self.marks.push(self.stack.len());
        Ok(())
    }

    fn pop_mark(&mut self) -> Result<Vec<NodeId>> {
        let at = self.marks.pop().ok_or_else(|| self.err(Rule::NoMark))?;
        Ok(self.stack.split_off(at))
    }

    /// `POP` drops the top value, or the open mark when nothing is above it (as Python does).
    fn pop_any(&mut self) -> Result<()> {
        if self.stack.len() > self.fence() {
            self.stack.pop();
            Ok(())
        } else {
            self.pop_mark().map(drop)
        }
    }

    fn put(&mut self, key: u64) -> Result<()> {
        let top = self.top()?;
        if !self.memo.contains_key(&key) && self.memo.len() >= self.limits.max_memo {
            return Err(self.err(Rule::TooManyMemo(self.limits.max_memo)));
        }
        self.memo.insert(key, top);
        Ok(())
    }

    fn get(&mut self, key: u64) -> Result<()> {
        let id = *self
            .memo
            .get(&key)
            .ok_or_else(|| self.err(Rule::MemoMissing(key)))?;
        self.push(id)
    }

    // ---- scalars ----

    fn text_int(&mut self) -> Result<()> {
        let line = self.line()?;
        match line {
            b"00" => self.push_new(Node::Bool(false)),
            b"01" => self.push_new(Node::Bool(true)),
            _ => self.decimal_int(line, "INT value"),
        }
    }

    fn text_long(&mut self) -> Result<()> {
        let line = self.line()?;
        let digits = line.strip_suffix(b"L").unwrap_or(line);
        self.decimal_int(digits, "LONG value")
    }

    fn decimal_int(&mut self, text: &[u8], what: &'static str) -> Result<()> {
        let node = decimal_to_node(text).ok_or_else(|| self.err(Rule::BadText(what)))?;
        self.push_new(node)
    }

    fn text_float(&mut self) -> Result<()> {
        let line = self.line()?;
        let value = std::str::from_utf8(line)
            .ok()
            .and_then(|s| s.trim().parse::<f64>().ok())
            .ok_or_else(|| self.err(Rule::BadText("FLOAT value")))?;
        self.push_new(Node::Float(value))
    }

    fn binary_long(&mut self, n: u64) -> Result<()> {
        let raw = self.take(n)?;
        let node = match fit_i64(raw) {
            Some(v) => Node::Int(v),
            None => Node::BigInt(raw.to_vec()),
        };
        self.push_new(node)
    }

    fn text_string(&mut self) -> Result<()> {
        let line = self.line()?;
        let quoted = line.len() >= 2
            && line[0] == line[line.len() - 1]
            && (line[0] == b'\'' || line[0] == b'"');
        if !quoted {
            return Err(self.err(Rule::BadText("STRING argument must be quoted")));
        }
        let raw =
            escape_decode(&line[1..line.len() - 1]).map_err(|why| self.err(Rule::BadText(why)))?;
        self.push_new(legacy_string_node(raw))
    }

    fn legacy_string(&mut self, n: u64) -> Result<()> {
        let raw = self.take(n)?.to_vec();
        self.push_new(legacy_string_node(raw))
    }

    fn text_unicode(&mut self) -> Result<()> {
        let line = self.line()?;
        let text = raw_unicode_escape_decode(line).map_err(|rule| self.err(rule))?;
        self.push_new(Node::Str(text))
    }

    fn unicode(&mut self, n: u64) -> Result<()> {
        let raw = self.take(n)?;
        let text = std::str::from_utf8(raw).map_err(|_| self.err(Rule::BadUtf8))?;
        self.push_new(Node::Str(text.to_string()))
    }

    fn bytes_node(&mut self, n: u64, mutable: bool) -> Result<()> {
        let raw = self.take(n)?.to_vec();
        self.push_new(if mutable {
            Node::ByteArray(raw)
        } else {
            Node::Bytes(raw)
        })
    }

    // ---- containers ----

    fn small_tuple(&mut self, n: usize) -> Result<()> {
        if self.stack.len() < self.fence() + n {
            return Err(self.err(Rule::StackUnderflow));
        }
        let items = self.stack.split_off(self.stack.len() - n);
        self.push_new(Node::Tuple(items))
    }

    fn append(&mut self, target: NodeId, values: &[NodeId]) -> Result<()> {
        match &mut self.nodes[target] {
            Node::List(items) | Node::Opaque { appends: items, .. } => {
                items.extend_from_slice(values);
                Ok(())
            }
            other => {
                let what = kind(other);
                Err(self.err(Rule::WrongTarget(what)))
            }
        }
    }

    fn add_items(&mut self) -> Result<()> {
        let values = self.pop_mark()?;
        let target = self.top()?;
        match &mut self.nodes[target] {
            Node::Set(items) => {
                items.extend(values);
                Ok(())
            }
            other => {
                let what = kind(other);
                Err(self.err(Rule::WrongTarget(what)))
            }
        }
    }

    fn dict_from_mark(&mut self) -> Result<()> {
        let values = self.pop_mark()?;
        let dict = self.new_node(Node::Dict {
            items: Vec::new(),
            ordered: false,
            state: None,
        })?;
        self.set_items(dict, &values)?;
        self.push(dict)
    }

    fn set_items(&mut self, target: NodeId, values: &[NodeId]) -> Result<()> {
        if values.len() % 2 != 0 {
            return Err(self.err(Rule::OddItems));
        }
        for pair in values.chunks_exact(2) {
            self.set_item(target, pair[0], pair[1])?;
        }
        Ok(())
    }

    fn set_item(&mut self, target: NodeId, key: NodeId, value: NodeId) -> Result<()> {
        let known = key_value(&self.nodes[key]);
        match &mut self.nodes[target] {
            Node::Opaque { items, .. } => items.push((key, value)),
            Node::Dict { items, .. } => {
                let Some(known) = known else {
                    items.push((key, value));
                    return Ok(());
                };
                let index = self.dict_keys.entry(target).or_default();
                match index.get(&known) {
                    Some(&at) => items[at].1 = value,
                    None => {
                        index.insert(known, items.len());
                        items.push((key, value));
                    }
                }
            }
            other => {
                let what = kind(other);
                return Err(self.err(Rule::WrongTarget(what)));
            }
        }
        Ok(())
    }

    fn build(&mut self) -> Result<()> {
        let new_state = self.pop()?;
        let target = self.top()?;
        match &mut self.nodes[target] {
            Node::Dict {
                ordered: true,
                state,
                ..
            }
            | Node::Opaque { state, .. } => {
                if state.is_some() {
                    return Err(self.err(Rule::SecondBuild));
                }
                *state = Some(new_state);
                Ok(())
            }
            other => {
                let what = kind(other);
                Err(self.err(Rule::WrongTarget(what)))
            }
        }
    }

    // ---- globals and calls ----

    fn global(&mut self, module: String, name: String) -> Result<()> {
        if module.contains('\n') || name.contains('\n') {
            return Err(self.err(Rule::NewlineInGlobal));
        }
        self.push_new(Node::Global { module, name })
    }

    fn text_global(&mut self) -> Result<()> {
        let module = self.line()?;
        let name = self.line()?;
        let (Ok(module), Ok(name)) = (std::str::from_utf8(module), std::str::from_utf8(name))
        else {
            return Err(self.err(Rule::BadUtf8));
        };
        self.global(module.to_string(), name.to_string())
    }

    fn stack_global(&mut self) -> Result<()> {
        let name = self.pop()?;
        let module = self.pop()?;
        match (&self.nodes[module], &self.nodes[name]) {
            (Node::Str(m), Node::Str(n)) => {
                let (m, n) = (m.clone(), n.clone());
                self.global(m, n)
            }
            _ => Err(self.err(Rule::BadCall("STACK_GLOBAL needs two str values"))),
        }
    }

    fn call(&mut self, callable: NodeId, args: NodeId, how: Build) -> Result<()> {
        let Node::Tuple(arg_ids) = &self.nodes[args] else {
            return Err(self.err(Rule::BadCall("call arguments are not a tuple")));
        };
        if let Build::NewObjEx { kwargs } = how {
            if !matches!(self.nodes[kwargs], Node::Dict { .. }) {
                return Err(self.err(Rule::BadCall("NEWOBJ_EX keyword arguments are not a dict")));
            }
        }
        let node = match &self.nodes[callable] {
            Node::Global { module, name } => match (module.as_str(), name.as_str()) {
                ("collections", "OrderedDict") if how == Build::Reduce && arg_ids.is_empty() => {
                    Some(Node::Dict {
                        items: Vec::new(),
                        ordered: true,
                        state: None,
                    })
                }
                (
                    "torch._utils",
                    function @ ("_rebuild_tensor_v2"
                    | "_rebuild_tensor_v3"
                    | "_rebuild_parameter"
                    | "_rebuild_parameter_with_state"),
                ) => {
                    let function = static_name(function);
                    if how != Build::Reduce {
                        return Err(self.err(Rule::BadRebuild {
                            function,
                            reason: "not called by REDUCE".into(),
                        }));
                    }
                    let arg_ids = arg_ids.clone();
                    Some(
                        self.rebuild(function, &arg_ids)
                            .map_err(|reason| self.err(Rule::BadRebuild { function, reason }))?,
                    )
                }
                _ => None,
            },
            _ => None,
        };
        let node = node.unwrap_or(Node::Opaque {
            callable,
            args,
            how,
            state: None,
            items: Vec::new(),
            appends: Vec::new(),
        });
        self.push_new(node)
    }

    fn rebuild(
        &self,
        function: &'static str,
        args: &[NodeId],
    ) -> std::result::Result<Node, String> {
        if function == "_rebuild_tensor_v2" || function == "_rebuild_tensor_v3" {
            return self.rebuild_tensor(args, function == "_rebuild_tensor_v3");
        }
        let wanted = if function == "_rebuild_parameter" {
            3
        } else {
            4
        };
        if args.len() != wanted {
            return Err(format!("takes {wanted} arguments, got {}", args.len()));
        }
        if !matches!(self.nodes[args[0]], Node::Tensor { .. }) {
            return Err(format!(
                "data is {}, not a tensor",
                kind(&self.nodes[args[0]])
            ));
        }
        Ok(Node::Parameter {
            data: args[0],
            requires_grad: self.bool_arg(args[1], "requires_grad")?,
            hooks: args[2],
            extra: args[3..].to_vec(),
        })
    }

    fn rebuild_tensor(&self, args: &[NodeId], v3: bool) -> std::result::Result<Node, String> {
        let fixed = if v3 { 7 } else { 6 };
        if args.len() < fixed {
            return Err(format!(
                "takes at least {fixed} arguments, got {}",
                args.len()
            ));
        }
        let dtype = if v3 {
            match &self.nodes[args[6]] {
                Node::Global { module, .. } if module == "torch" => Some(args[6]),
                other => return Err(format!("dtype is {}, not a torch dtype", kind(other))),
            }
        } else {
            None
        };
        if !matches!(self.nodes[args[0]], Node::Storage { .. }) {
            return Err(format!(
                "storage is {}, not a persistent storage",
                kind(&self.nodes[args[0]])
            ));
        }
        let offset = self.count_arg(args[1], "storage offset")?;
        let size = self.counts_arg(args[2], "size")?;
        let stride = self.counts_arg(args[3], "stride")?;
        if size.len() != stride.len() {
            return Err(format!(
                "size has {} dimensions but stride {}",
                size.len(),
                stride.len()
            ));
        }
        Ok(Node::Tensor {
            storage: args[0],
            offset,
            size,
            stride,
            requires_grad: self.bool_arg(args[4], "requires_grad")?,
            hooks: args[5],
            dtype,
            extra: args[fixed..].to_vec(),
        })
    }

    fn bool_arg(&self, id: NodeId, what: &str) -> std::result::Result<bool, String> {
        match self.nodes[id] {
            Node::Bool(b) => Ok(b),
            ref other => Err(format!("{what} is {}, not a bool", kind(other))),
        }
    }

    fn count_arg(&self, id: NodeId, what: &str) -> std::result::Result<u64, String> {
        match self.nodes[id] {
            Node::Int(v) if v >= 0 => Ok(v as u64),
            Node::Int(v) => Err(format!("{what} is negative ({v})")),
            ref other => Err(format!("{what} is {}, not an int", kind(other))),
        }
    }

    fn counts_arg(&self, id: NodeId, what: &str) -> std::result::Result<Vec<u64>, String> {
        match &self.nodes[id] {
            Node::Tuple(items) => items.iter().map(|&i| self.count_arg(i, what)).collect(),
            other => Err(format!("{what} is {}, not a tuple", kind(other))),
        }
    }

    fn persistent_storage(&mut self) -> Result<()> {
        let pid = self.pop()?;
        let storage = self
            .storage_from_pid(pid)
            .map_err(|why| self.err(Rule::BadPersistentId(why)))?;
        self.push_new(storage)
    }

    fn storage_from_pid(&self, pid: NodeId) -> std::result::Result<Node, &'static str> {
        let Node::Tuple(fields) = &self.nodes[pid] else {
            return Err("not a tuple");
        };
        let [tag, class, key, location, numel] = fields[..] else {
            return Err("not a 5-tuple");
        };
        let field = |id: NodeId| &self.nodes[id];
        if !matches!(field(tag), Node::Str(s) if s == "storage") {
            return Err("first field is not 'storage'");
        }
        let class = match field(class) {
            Node::Global { module, name }
                if (module == "torch" || module == "torch.storage")
                    && name.ends_with("Storage") =>
            {
                name.clone()
            }
            _ => return Err("second field is not a torch storage class"),
        };
        let (Node::Str(key), Node::Str(location)) = (field(key), field(location)) else {
            return Err("key or location is not a str");
        };
        let Node::Int(numel) = *field(numel) else {
            return Err("element count is not an int");
        };
        let numel = u64::try_from(numel).map_err(|_| "element count is negative")?;
        Ok(Node::Storage {
            class,
            key: key.clone(),
            location: location.clone(),
            numel,
        })
    }
}

fn static_name(function: &str) -> &'static str {
    match function {
        "_rebuild_tensor_v2" => "_rebuild_tensor_v2",
        "_rebuild_tensor_v3" => "_rebuild_tensor_v3",
        "_rebuild_parameter" => "_rebuild_parameter",
        _ => "_rebuild_parameter_with_state",
    }
}

/// Python 2 `str` values become `str` when they are UTF-8, else bytes.
fn legacy_string_node(raw: Vec<u8>) -> Node {
    match String::from_utf8(raw) {
        Ok(text) => Node::Str(text),
        Err(e) => Node::Bytes(e.into_bytes()),
    }
}

/// The value of little-endian two's complement bytes, when it fits `i64`.
fn fit_i64(raw: &[u8]) -> Option<i64> {
    if raw.is_empty() {
        return Some(0);
    }
    let negative = raw[raw.len() - 1] & 0x80 != 0;
    let fill = if negative { 0xff } else { 0 };
    let mut buf = [fill; 8];
    for (i, &b) in raw.iter().enumerate() {
        if i < 8 {
            buf[i] = b;
        } else if b != fill {
            return None;
        }
    }
    let value = i64::from_le_bytes(buf);
    // Redundant sign bytes beyond the eighth must agree with the sign of the first eight.
    (raw.len() <= 8 || (value < 0) == negative).then_some(value)
}

/// Minimal little-endian two's complement bytes of `value`, as Python's `encode_long`.
fn encode_long(value: i64) -> Vec<u8> {
    if value == 0 {
        return Vec::new();
    }
    trim_twos_complement(value.to_le_bytes().to_vec())
}

fn trim_twos_complement(mut raw: Vec<u8>) -> Vec<u8> {
    while raw.len() > 1 {
        let (last, prev) = (raw[raw.len() - 1], raw[raw.len() - 2]);
        let redundant = (last == 0 && prev & 0x80 == 0) || (last == 0xff && prev & 0x80 != 0);
        if !redundant {
            break;
        }
        raw.pop();
    }
    raw
}

/// Decimal integer text (optional sign) as an `Int` or, when it does not fit, a `BigInt`.
fn decimal_to_node(text: &[u8]) -> Option<Node> {
    let text = std::str::from_utf8(text).ok()?.trim();
    let (negative, digits) = match text.as_bytes().first()? {
        b'-' => (true, &text[1..]),
        b'+' => (false, &text[1..]),
        _ => (false, text),
    };
    if digits.is_empty()
        || digits.len() > MAX_DECIMAL_DIGITS
        || !digits.bytes().all(|b| b.is_ascii_digit())
    {
        return None;
    }
    if let Ok(v) = text.parse::<i64>() {
        return Some(Node::Int(v));
    }
    // Magnitude in base 2^32 limbs, little-endian.
    let mut limbs: Vec<u32> = vec![0];
    for d in digits.bytes() {
        let mut carry = u64::from(d - b'0');
        for limb in limbs.iter_mut() {
            let v = u64::from(*limb) * 10 + carry;
            *limb = v as u32;
            carry = v >> 32;
        }
        if carry > 0 {
            limbs.push(carry as u32);
        }
    }
    let mut raw: Vec<u8> = limbs.iter().flat_map(|l| l.to_le_bytes()).collect();
    raw.push(0); // room for the sign bit
    if negative {
        let mut carry = true;
        for b in raw.iter_mut() {
            let (v, c) = (!*b).overflowing_add(u8::from(carry));
            *b = v;
            carry = c;
        }
    }
    Some(Node::BigInt(trim_twos_complement(raw)))
}

/// Python's `codecs.escape_decode`, which the `STRING` opcode applies to its quoted argument.
fn escape_decode(text: &[u8]) -> std::result::Result<Vec<u8>, &'static str> {
    let mut out = Vec::with_capacity(text.len());
    let mut i = 0;
    while i < text.len() {
        let c = text[i];
        i += 1;
        if c != b'\\' {
            out.push(c);
            continue;
        }
        let Some(&e) = text.get(i) else {
            return Err("trailing backslash in STRING");
        };
        i += 1;
        match e {
            b'\n' => {}
            b'\\' | b'\'' | b'"' => out.push(e),
            b'b' => out.push(8),
            b'f' => out.push(12),
            b't' => out.push(b'\t'),
            b'n' => out.push(b'\n'),
            b'r' => out.push(b'\r'),
            b'v' => out.push(11),
            b'a' => out.push(7),
            b'0'..=b'7' => {
                let mut v = u32::from(e - b'0');
                for _ in 0..2 {
                    match text.get(i) {
                        Some(&d @ b'0'..=b'7') => {
                            v = v * 8 + u32::from(d - b'0');
                            i += 1;
                        }
                        _ => break,
                    }
                }
                out.push(v as u8);
            }
            b'x' => {
                let hex = text.get(i..i + 2).ok_or("invalid \\x escape in STRING")?;
                let v = std::str::from_utf8(hex)
                    .ok()
                    .and_then(|h| u8::from_str_radix(h, 16).ok())
                    .ok_or("invalid \\x escape in STRING")?;
                out.push(v);
                i += 2;
            }
            _ => out.extend_from_slice(&[b'\\', e]),
        }
    }
    Ok(out)
}

/// Python's `raw-unicode-escape` decoding, which the `UNICODE` opcode applies: bytes are code
/// points, and `\uXXXX` / `\UXXXXXXXX` after an odd run of backslashes are escapes.
fn raw_unicode_escape_decode(text: &[u8]) -> std::result::Result<String, Rule> {
    let mut out = String::with_capacity(text.len());
    let mut i = 0;
    while i < text.len() {
        if text[i] != b'\\' {
            out.push(char::from(text[i]));
            i += 1;
            continue;
        }
        let run_start = i;
        while i < text.len() && text[i] == b'\\' {
            out.push('\\');
            i += 1;
        }
        let odd = (i - run_start) % 2 == 1;
        let width = match text.get(i) {
            Some(b'u') if odd => 4,
            Some(b'U') if odd => 8,
            _ => continue,
        };
        out.pop();
        let hex = text
            .get(i + 1..i + 1 + width)
            .ok_or(Rule::BadText("truncated \\u escape in UNICODE"))?;
        let code = std::str::from_utf8(hex)
            .ok()
            .and_then(|h| u32::from_str_radix(h, 16).ok())
            .ok_or(Rule::BadText("invalid \\u escape in UNICODE"))?;
        out.push(char::from_u32(code).ok_or(Rule::BadUtf8)?);
        i += 1 + width;
    }
    Ok(out)
}

// ---- traversal ----

impl Pickle {
    /// Every node this node refers to, in the order a writer emits them.
    fn edges(&self, id: NodeId) -> Vec<NodeId> {
        let mut out = Vec::new();
        match &self.nodes[id] {
            Node::Tuple(items) | Node::List(items) | Node::Set(items) | Node::FrozenSet(items) => {
                out.extend_from_slice(items)
            }
            Node::Dict { items, state, .. } => {
                out.extend(items.iter().flat_map(|&(k, v)| [k, v]));
                out.extend(*state);
            }
            Node::Tensor {
                storage,
                hooks,
                dtype,
                extra,
                ..
            } => {
                out.push(*storage);
                out.push(*hooks);
                out.extend(*dtype);
                out.extend_from_slice(extra);
            }
            Node::Parameter {
                data, hooks, extra, ..
            } => {
                out.push(*data);
                out.push(*hooks);
                out.extend_from_slice(extra);
            }
            Node::Opaque {
                callable,
                args,
                how,
                state,
                items,
                appends,
            } => {
                out.push(*callable);
                out.push(*args);
                if let Build::NewObjEx { kwargs } = how {
                    out.push(*kwargs);
                }
                out.extend_from_slice(appends);
                out.extend(items.iter().flat_map(|&(k, v)| [k, v]));
                out.extend(*state);
            }
            _ => {}
        }
        out
    }

    /// Whether a depth-first walk from the root (each node once) goes deeper than `max_depth`.
    fn depth_exceeds(&self, max_depth: usize) -> bool {
        let mut seen = vec![false; self.nodes.len()];
        let mut work = vec![(self.root, 0usize)];
        while let Some((id, depth)) = work.pop() {
            if std::mem::replace(&mut seen[id], true) {
                continue;
            }
            if depth > max_depth {
                return true;
            }
            work.extend(
                self.edges(id)
                    .into_iter()
                    .rev()
                    .map(|child| (child, depth + 1)),
            );
        }
        false
    }

    /// Which nodes are reachable from the root (each visited once, without recursion).
    pub fn reachable(&self) -> Vec<bool> {
        let mut seen = vec![false; self.nodes.len()];
        let mut work = vec![self.root];
        while let Some(id) = work.pop() {
            if !std::mem::replace(&mut seen[id], true) {
                work.extend(self.edges(id));
            }
        }
        seen
    }

    /// The tensor node a named node stands for: a parameter's data, or the node itself.
    pub fn tensor_of(&self, id: NodeId) -> NodeId {
        match &self.nodes[id] {
            Node::Parameter { data, .. } => *data,
            _ => id,
        }
    }

    /// How many references each node reachable from the root has (the root counts one).
    fn reference_counts(&self) -> Vec<u32> {
        let mut counts = vec![0u32; self.nodes.len()];
        let mut seen = vec![false; self.nodes.len()];
        let mut work = vec![self.root];
        counts[self.root] = 1;
        while let Some(id) = work.pop() {
            if std::mem::replace(&mut seen[id], true) {
                continue;
            }
            for child in self.edges(id) {
                counts[child] = counts[child].saturating_add(1);
                work.push(child);
            }
        }
        counts
    }

    /// Every tensor and parameter reachable from the root, named by its key path (see the
    /// module documentation), in depth-first order.
    pub fn tensors(&self) -> Vec<(String, NodeId)> {
        // Each visited node records its parent's frame and the step from it; names are only
        // spelled out for tensors.
        let mut frames: Vec<(Option<usize>, Step)> = Vec::new();
        let mut seen = vec![false; self.nodes.len()];
        let mut work = vec![(self.root, None, Step::Root)];
        let mut out = Vec::new();
        while let Some((id, parent, step)) = work.pop() {
            if std::mem::replace(&mut seen[id], true) {
                continue;
            }
            frames.push((parent, step));
            let frame = frames.len() - 1;
            if matches!(self.nodes[id], Node::Tensor { .. } | Node::Parameter { .. }) {
                out.push((self.name_of(&frames, frame), id));
                continue;
            }
            let children = self.named_children(id);
            work.extend(
                children
                    .into_iter()
                    .rev()
                    .map(|(child, step)| (child, Some(frame), step)),
            );
        }
        out
    }

    fn named_children(&self, id: NodeId) -> Vec<(NodeId, Step)> {
        let keyed = |items: &[(NodeId, NodeId)]| -> Vec<(NodeId, Step)> {
            items
                .iter()
                .enumerate()
                .map(|(at, &(k, v))| (v, self.key_step(k, at)))
                .collect()
        };
        let indexed = |items: &[NodeId]| -> Vec<(NodeId, Step)> {
            items
                .iter()
                .enumerate()
                .map(|(i, &v)| (v, Step::Index(i)))
                .collect()
        };
        match &self.nodes[id] {
            Node::Tuple(items) | Node::List(items) | Node::Set(items) | Node::FrozenSet(items) => {
                indexed(items)
            }
            Node::Dict { items, state, .. } => {
                let mut out = keyed(items);
                out.extend(state.map(|s| (s, Step::Named("state"))));
                out
            }
            Node::Opaque {
                args,
                how,
                state,
                items,
                appends,
                ..
            } => {
                let mut out = vec![(*args, Step::Named("args"))];
                if let Build::NewObjEx { kwargs } = how {
                    out.push((*kwargs, Step::Named("kwargs")));
                }
                if items.is_empty() {
                    out.extend(indexed(appends));
                } else {
                    out.extend(
                        appends
                            .iter()
                            .enumerate()
                            .map(|(i, &v)| (v, Step::Append(i))),
                    );
                }
                out.extend(keyed(items));
                out.extend(state.map(|s| (s, Step::Named("state"))));
                out
            }
            _ => Vec::new(),
        }
    }

    fn key_step(&self, key: NodeId, position: usize) -> Step {
        match self.nodes[key] {
            Node::Str(_) | Node::Int(_) | Node::Bool(_) | Node::None => Step::Key(key),
            _ => Step::KeyAt(position),
        }
    }

    fn name_of(&self, frames: &[(Option<usize>, Step)], frame: usize) -> String {
        let mut parts = Vec::new();
        let mut at = Some(frame);
        while let Some(f) = at {
            let (parent, step) = &frames[f];
            if !matches!(step, Step::Root) {
                parts.push(self.spell(step));
            }
            at = *parent;
        }
        parts.reverse();
        parts.join("/")
    }

    fn spell(&self, step: &Step) -> String {
        match step {
            Step::Root => String::new(),
            Step::Index(i) => i.to_string(),
            Step::Append(i) => format!("%{{append {i}}}"),
            Step::KeyAt(i) => format!("%{{key {i}}}"),
            Step::Named(what) => format!("%{{{what}}}"),
            Step::Key(key) => match &self.nodes[*key] {
                Node::Str(s) => escape_key(s),
                Node::Int(i) => format!("%{{int {i}}}"),
                Node::Bool(true) => "%{true}".into(),
                Node::Bool(false) => "%{false}".into(),
                _ => "%{none}".into(),
            },
        }
    }

    /// Whether `other` holds the same values with the same sharing, whatever the node ids.
    /// Numbers, `None`, bools and storages are compared by value: the writer re-emits them at
    /// each reference.
    pub fn equivalent(&self, other: &Pickle) -> bool {
        let mut forward: HashMap<NodeId, NodeId> = HashMap::new();
        let mut backward: HashMap<NodeId, NodeId> = HashMap::new();
        let mut work = vec![(self.root, other.root)];
        while let Some((a, b)) = work.pop() {
            let (na, nb) = (&self.nodes[a], &other.nodes[b]);
            if written_afresh(na) || written_afresh(nb) {
                if !same_scalars(na, nb) {
                    return false;
                }
                continue;
            }
            match forward.get(&a) {
                Some(&seen) if seen == b => continue,
                Some(_) => return false,
                None if backward.contains_key(&b) => return false,
                None => {
                    forward.insert(a, b);
                    backward.insert(b, a);
                }
            }
            if !same_scalars(na, nb) {
                return false;
            }
            let (ea, eb) = (self.edges(a), other.edges(b));
            if ea.len() != eb.len() {
                return false;
            }
            work.extend(ea.into_iter().zip(eb));
        }
        true
    }
}

/// One step of a key path.
enum Step {
    Root,
    Key(NodeId),
    KeyAt(usize),
    Index(usize),
    Append(usize),
    Named(&'static str),
}

/// Values the writer emits at every reference instead of memoizing: Python's pickler never
/// memoizes `None`, bools, ints or floats, and the framework re-emits a storage's persistent id.
fn written_afresh(node: &Node) -> bool {
    matches!(
        node,
        Node::None
            | Node::Bool(_)
            | Node::Int(_)
            | Node::BigInt(_)
            | Node::Float(_)
            | Node::Storage { .. }
    )
}

/// Equal kind and equal own values (children are compared by the caller).
fn same_scalars(a: &Node, b: &Node) -> bool {
    use Node as N;
    match (a, b) {
        (N::Float(x), N::Float(y)) => x.to_bits() == y.to_bits(),
        (N::Tuple(x), N::Tuple(y))
        | (N::List(x), N::List(y))
        | (N::Set(x), N::Set(y))
        | (N::FrozenSet(x), N::FrozenSet(y)) => x.len() == y.len(),
        (
            N::Dict {
                items: x,
                ordered: ox,
                state: sx,
            },
            N::Dict {
                items: y,
                ordered: oy,
                state: sy,
            },
        ) => x.len() == y.len() && ox == oy && sx.is_some() == sy.is_some(),
        (
            N::Tensor {
                offset: o1,
                size: s1,
                stride: t1,
                requires_grad: r1,
                extra: e1,
                ..
            },
            N::Tensor {
                offset: o2,
                size: s2,
                stride: t2,
                requires_grad: r2,
                extra: e2,
                ..
            },
        ) => o1 == o2 && s1 == s2 && t1 == t2 && r1 == r2 && e1.len() == e2.len(),
        (
            N::Parameter {
                requires_grad: r1,
                extra: e1,
                ..
            },
            N::Parameter {
                requires_grad: r2,
                extra: e2,
                ..
            },
        ) => r1 == r2 && e1.len() == e2.len(),
        (
            N::Opaque {
                how: h1,
                state: s1,
                items: i1,
                appends: a1,
                ..
            },
            N::Opaque {
                how: h2,
                state: s2,
                items: i2,
                appends: a2,
                ..
            },
        ) => {
            std::mem::discriminant(h1) == std::mem::discriminant(h2)
                && s1.is_some() == s2.is_some()
                && i1.len() == i2.len()
                && a1.len() == a2.len()
        }
        (N::None, N::None)
        | (N::Bool(_), N::Bool(_))
        | (N::Int(_), N::Int(_))
        | (N::BigInt(_), N::BigInt(_))
        | (N::Str(_), N::Str(_))
        | (N::Bytes(_), N::Bytes(_))
        | (N::ByteArray(_), N::ByteArray(_))
        | (N::Global { .. }, N::Global { .. })
        | (N::Storage { .. }, N::Storage { .. }) => a == b,
        _ => false,
    }
}

// ---- writing ----

/// Writes the arena as a pickle (protocol 2 unless a node needs a later one; see the module
/// documentation). Node ids must lie inside the arena.
pub fn write(p: &Pickle) -> Vec<u8> {
    Writer::new(p).run()
}

enum Task {
    Save(NodeId),
    Op(u8),
    Bool(bool),
    /// A tensor's storage offset.
    Count(u64),
    /// A tensor's size or stride tuple.
    Counts(Vec<u64>),
    /// After a tuple's elements: the tuple itself, unless an element's save already emitted it.
    FinishTuple {
        id: NodeId,
        len: usize,
        marked: bool,
    },
    FinishFrozenSet(NodeId),
    /// After a call: memoize the result, unless an argument's save already emitted it.
    FinishCall(NodeId),
    /// As `FinishCall`, then fill the opaque object.
    FinishObject(NodeId),
}

struct Writer<'a> {
    p: &'a Pickle,
    out: Vec<u8>,
    shared: Vec<bool>,
    memo: HashMap<NodeId, u32>,
    /// Memo keys of the globals the writer itself names (rebuild functions, storage classes).
    own_globals: HashMap<(String, String), u32>,
    next_key: u32,
    work: Vec<Task>,
}

impl<'a> Writer<'a> {
    fn new(p: &'a Pickle) -> Self {
        let shared = p
            .reference_counts()
            .iter()
            .zip(&p.nodes)
            .map(|(&count, node)| count > 1 && !written_afresh(node))
            .collect();
        Writer {
            p,
            out: Vec::new(),
            shared,
            memo: HashMap::new(),
            own_globals: HashMap::new(),
            next_key: 0,
            work: Vec::new(),
        }
    }

    fn run(mut self) -> Vec<u8> {
        self.out.extend_from_slice(&[0x80, self.protocol_needed()]);
        self.work.push(Task::Save(self.p.root));
        while let Some(task) = self.work.pop() {
            self.perform(task);
        }
        self.out.push(b'.');
        self.out
    }

    /// 2, or the protocol that introduced the opcode a reachable node needs.
    fn protocol_needed(&self) -> u8 {
        let mut needed = 2;
        let mut seen = vec![false; self.p.nodes.len()];
        let mut work = vec![self.p.root];
        while let Some(id) = work.pop() {
            if std::mem::replace(&mut seen[id], true) {
                continue;
            }
            needed = needed.max(match &self.p.nodes[id] {
                Node::Bytes(_) => 3,
                Node::Set(_) | Node::FrozenSet(_) => 4,
                Node::Str(s) if u32::try_from(s.len()).is_err() => 4,
                Node::ByteArray(_) => 5,
                _ => 2,
            });
            work.extend(self.p.edges(id));
        }
        needed
    }

    fn schedule(&mut self, tasks: Vec<Task>) {
        self.work.extend(tasks.into_iter().rev());
    }

    fn perform(&mut self, task: Task) {
        match task {
            Task::Save(id) => self.save(id),
            Task::Op(op) => self.out.push(op),
            Task::Bool(b) => self.out.push(if b { 0x88 } else { 0x89 }),
            Task::Count(v) => self.emit_count(v),
            Task::Counts(values) => self.emit_count_tuple(&values),
            Task::FinishTuple { id, len, marked } => {
                if self.fetch_again(id, if marked { b"1" } else { b"" }, len) {
                    return;
                }
                self.out.push(match len {
                    1 => 0x85,
                    2 => 0x86,
                    3 => 0x87,
                    _ => b't',
                });
                self.memoize(id);
            }
            Task::FinishFrozenSet(id) => {
                if !self.fetch_again(id, b"1", 0) {
                    self.out.push(0x91);
                    self.memoize(id);
                }
            }
            Task::FinishCall(id) => {
                if !self.fetch_again(id, b"0", 0) {
                    self.memoize(id);
                }
            }
            Task::FinishObject(id) => {
                if !self.fetch_again(id, b"0", 0) {
                    self.memoize(id);
                    self.fill_object(id);
                }
            }
        }
    }

    /// When a recursive save already emitted `id`, drops what was built for it (`drop` plus
    /// `pops` POPs) and fetches the memoized value instead, as Python's pickler does.
    fn fetch_again(&mut self, id: NodeId, drop: &[u8], pops: usize) -> bool {
        let Some(&key) = self.memo.get(&id) else {
            return false;
        };
        self.out.extend_from_slice(drop);
        self.out.extend(std::iter::repeat_n(b'0', pops));
        self.emit_get(key);
        true
    }

    fn save(&mut self, id: NodeId) {
        if let Some(&key) = self.memo.get(&id) {
            self.emit_get(key);
            return;
        }
        let p = self.p;
        match &p.nodes[id] {
            Node::None => self.out.push(b'N'),
            Node::Bool(b) => self.perform(Task::Bool(*b)),
            Node::Int(v) => self.emit_int(*v),
            Node::BigInt(raw) => self.emit_long(raw),
            Node::Float(v) => {
                self.out.push(b'G');
                self.out.extend_from_slice(&v.to_be_bytes());
            }
            Node::Str(s) => self.emit_str(s),
            Node::Bytes(raw) => self.emit_bytes(raw),
            Node::ByteArray(raw) => {
                self.out.push(0x96);
                self.out
                    .extend_from_slice(&(raw.len() as u64).to_le_bytes());
                self.out.extend_from_slice(raw);
            }
            Node::Global { module, name } => self.emit_global(module, name),
            Node::Storage {
                class,
                key,
                location,
                numel,
            } => {
                self.emit_persistent_id(class, key, location, *numel);
                return;
            }
            Node::Tuple(items) => return self.save_tuple(id, items),
            Node::FrozenSet(items) => {
                self.out.push(b'(');
                let mut tasks: Vec<Task> = items.iter().map(|&i| Task::Save(i)).collect();
                tasks.push(Task::FinishFrozenSet(id));
                return self.schedule(tasks);
            }
            Node::List(items) => {
                self.out.push(b']');
                self.memoize(id);
                let tasks = batches(items, Some(b'a'), b'e');
                return self.schedule(tasks);
            }
            Node::Set(items) => {
                self.out.push(0x8f);
                self.memoize(id);
                let tasks = batches(items, None, 0x90);
                return self.schedule(tasks);
            }
            Node::Dict {
                items,
                ordered,
                state,
            } => {
                if *ordered {
                    self.emit_own_global("collections", "OrderedDict");
                    self.out.extend_from_slice(b")R");
                } else {
                    self.out.push(b'}');
                }
                self.memoize(id);
                let mut tasks = item_batches(items);
                tasks.extend(state.iter().flat_map(|&s| [Task::Save(s), Task::Op(b'b')]));
                return self.schedule(tasks);
            }
            Node::Tensor { .. } => return self.save_tensor(id),
            Node::Parameter {
                data,
                requires_grad,
                hooks,
                extra,
            } => {
                let function = if extra.is_empty() {
                    "_rebuild_parameter"
                } else {
                    "_rebuild_parameter_with_state"
                };
                self.emit_own_global("torch._utils", function);
                self.out.push(b'(');
                let mut tasks = vec![
                    Task::Save(*data),
                    Task::Bool(*requires_grad),
                    Task::Save(*hooks),
                ];
                tasks.extend(extra.iter().map(|&e| Task::Save(e)));
                tasks.extend([Task::Op(b't'), Task::Op(b'R'), Task::FinishCall(id)]);
                return self.schedule(tasks);
            }
            Node::Opaque {
                callable,
                args,
                how,
                ..
            } => {
                let mut tasks = vec![Task::Save(*callable), Task::Save(*args)];
                match how {
                    Build::Reduce => tasks.push(Task::Op(b'R')),
                    Build::NewObj => tasks.push(Task::Op(0x81)),
                    Build::NewObjEx { kwargs } => {
                        tasks.extend([Task::Save(*kwargs), Task::Op(0x92)])
                    }
                }
                tasks.push(Task::FinishObject(id));
                return self.schedule(tasks);
            }
        }
        self.memoize(id);
    }

    fn save_tuple(&mut self, id: NodeId, items: &[NodeId]) {
        if items.is_empty() {
            self.out.push(b')');
            return self.memoize(id);
        }
        let marked = items.len() > 3;
        if marked {
            self.out.push(b'(');
        }
        let mut tasks: Vec<Task> = items.iter().map(|&i| Task::Save(i)).collect();
        tasks.push(Task::FinishTuple {
            id,
            len: items.len(),
            marked,
        });
        self.schedule(tasks);
    }

    fn save_tensor(&mut self, id: NodeId) {
        let Node::Tensor {
            storage,
            offset,
            size,
            stride,
            requires_grad,
            hooks,
            dtype,
            extra,
        } = &self.p.nodes[id]
        else {
            return;
        };
        let function = if dtype.is_some() {
            "_rebuild_tensor_v3"
        } else {
            "_rebuild_tensor_v2"
        };
        self.emit_own_global("torch._utils", function);
        self.out.push(b'(');
        let mut tasks = vec![
            Task::Save(*storage),
            Task::Count(*offset),
            Task::Counts(size.clone()),
            Task::Counts(stride.clone()),
            Task::Bool(*requires_grad),
            Task::Save(*hooks),
        ];
        tasks.extend(dtype.iter().map(|&d| Task::Save(d)));
        tasks.extend(extra.iter().map(|&e| Task::Save(e)));
        tasks.extend([Task::Op(b't'), Task::Op(b'R'), Task::FinishCall(id)]);
        self.schedule(tasks);
    }

    fn fill_object(&mut self, id: NodeId) {
        let Node::Opaque {
            state,
            items,
            appends,
            ..
        } = &self.p.nodes[id]
        else {
            return;
        };
        let mut tasks = batches(appends, Some(b'a'), b'e');
        tasks.extend(item_batches(items));
        tasks.extend(state.iter().flat_map(|&s| [Task::Save(s), Task::Op(b'b')]));
        self.schedule(tasks);
    }

    fn memoize(&mut self, id: NodeId) {
        if !self.shared[id] {
            return;
        }
        let key = self.put();
        self.memo.insert(id, key);
    }

    /// Stores the top of the stack under the next memo key.
    fn put(&mut self) -> u32 {
        let key = self.next_key;
        self.next_key += 1;
        match u8::try_from(key) {
            Ok(k) => self.out.extend_from_slice(&[b'q', k]),
            Err(_) => {
                self.out.push(b'r');
                self.out.extend_from_slice(&key.to_le_bytes());
            }
        }
        key
    }

    /// A global the writer names itself, memoized on first use as Python's pickler does.
    fn emit_own_global(&mut self, module: &str, name: &str) {
        let id = (module.to_string(), name.to_string());
        if let Some(&key) = self.own_globals.get(&id) {
            return self.emit_get(key);
        }
        self.emit_global(module, name);
        let key = self.put();
        self.own_globals.insert(id, key);
    }

    fn emit_get(&mut self, key: u32) {
        match u8::try_from(key) {
            Ok(k) => self.out.extend_from_slice(&[b'h', k]),
            Err(_) => {
                self.out.push(b'j');
                self.out.extend_from_slice(&key.to_le_bytes());
            }
        }
    }

    fn emit_int(&mut self, v: i64) {
        if let Ok(b) = u8::try_from(v) {
            self.out.extend_from_slice(&[b'K', b]);
        } else if let Ok(w) = u16::try_from(v) {
            self.out.push(b'M');
            self.out.extend_from_slice(&w.to_le_bytes());
        } else if let Ok(d) = i32::try_from(v) {
            self.out.push(b'J');
            self.out.extend_from_slice(&d.to_le_bytes());
        } else {
            self.emit_long(&encode_long(v));
        }
    }

    fn emit_count(&mut self, v: u64) {
        match i64::try_from(v) {
            Ok(v) => self.emit_int(v),
            Err(_) => {
                let mut raw = v.to_le_bytes().to_vec();
                raw.push(0);
                self.emit_long(&trim_twos_complement(raw));
            }
        }
    }

    fn emit_count_tuple(&mut self, values: &[u64]) {
        let marked = values.len() > 3;
        if values.is_empty() {
            self.out.push(b')');
            return;
        }
        if marked {
            self.out.push(b'(');
        }
        for &v in values {
            self.emit_count(v);
        }
        self.out.push(match values.len() {
            1 => 0x85,
            2 => 0x86,
            3 => 0x87,
            _ => b't',
        });
    }

    fn emit_long(&mut self, raw: &[u8]) {
        match u8::try_from(raw.len()) {
            Ok(n) => self.out.extend_from_slice(&[0x8a, n]),
            Err(_) => {
                self.out.push(0x8b);
                self.out
                    .extend_from_slice(&(raw.len() as u32).to_le_bytes());
            }
        }
        self.out.extend_from_slice(raw);
    }

    fn emit_str(&mut self, s: &str) {
        match u32::try_from(s.len()) {
            Ok(n) => {
                self.out.push(b'X');
                self.out.extend_from_slice(&n.to_le_bytes());
            }
            Err(_) => {
                self.out.push(0x8d);
                self.out.extend_from_slice(&(s.len() as u64).to_le_bytes());
            }
        }
        self.out.extend_from_slice(s.as_bytes());
    }

    fn emit_bytes(&mut self, raw: &[u8]) {
        if let Ok(n) = u8::try_from(raw.len()) {
            self.out.extend_from_slice(&[b'C', n]);
        } else if let Ok(n) = u32::try_from(raw.len()) {
            self.out.push(b'B');
            self.out.extend_from_slice(&n.to_le_bytes());
        } else {
            self.out.push(0x8e);
            self.out
                .extend_from_slice(&(raw.len() as u64).to_le_bytes());
        }
        self.out.extend_from_slice(raw);
    }

    fn emit_global(&mut self, module: &str, name: &str) {
        self.out.push(b'c');
        for part in [module, name] {
            self.out.extend_from_slice(part.as_bytes());
            self.out.push(b'\n');
        }
    }

    /// The framework's persistent id of a storage, emitted afresh at every reference.
    fn emit_persistent_id(&mut self, class: &str, key: &str, location: &str, numel: u64) {
        self.out.push(b'(');
        self.emit_str("storage");
        // The framework names its untyped storage class by its home module, which its safe
        // loader allows (the same class reached as torch.UntypedStorage it does not).
        let module = if class == "UntypedStorage" {
            "torch.storage"
        } else {
            "torch"
        };
        self.emit_own_global(module, class);
        self.emit_str(key);
        self.emit_str(location);
        self.emit_count(numel);
        self.out.extend_from_slice(b"tQ");
    }
}

/// `APPEND`/`APPENDS` (or `ADDITEMS`) batches of at most [`BATCH`] values, as Python writes them.
fn batches(values: &[NodeId], single: Option<u8>, many: u8) -> Vec<Task> {
    let mut tasks = Vec::new();
    for chunk in values.chunks(BATCH) {
        match (chunk, single) {
            ([one], Some(op)) => tasks.extend([Task::Save(*one), Task::Op(op)]),
            _ => {
                tasks.push(Task::Op(b'('));
                tasks.extend(chunk.iter().map(|&v| Task::Save(v)));
                tasks.push(Task::Op(many));
            }
        }
    }
    tasks
}

/// `SETITEM`/`SETITEMS` batches, as Python writes them.
fn item_batches(items: &[(NodeId, NodeId)]) -> Vec<Task> {
    let mut tasks = Vec::new();
    for chunk in items.chunks(BATCH) {
        let marked = chunk.len() > 1;
        if marked {
            tasks.push(Task::Op(b'('));
        }
        tasks.extend(
            chunk
                .iter()
                .flat_map(|&(k, v)| [Task::Save(k), Task::Save(v)]),
        );
        tasks.push(Task::Op(if marked { b'u' } else { b's' }));
    }
    tasks
}

#[cfg(test)]
mod tests {
    //! Opcode bytes and their meaning follow Python's `pickletools` opcode table; the `.pkl`
    //! fixtures are written by Python's own `pickle` module (fixtures/pickle/make_pickles.py).

    use super::*;

    fn cat(parts: &[&[u8]]) -> Vec<u8> {
        parts.concat()
    }

    fn uni(s: &str) -> Vec<u8> {
        cat(&[b"X", &(s.len() as u32).to_le_bytes(), s.as_bytes()])
    }

    fn glob(module: &str, name: &str) -> Vec<u8> {
        format!("c{module}\n{name}\n").into_bytes()
    }

    fn parse_ok(bytes: &[u8]) -> Pickle {
        parse(bytes, &Limits::for_len(bytes.len())).unwrap_or_else(|e| panic!("{e}"))
    }

    fn parse_err(bytes: &[u8]) -> PickleError {
        parse(bytes, &Limits::for_len(bytes.len())).expect_err("stream must be refused")
    }

    fn root(bytes: &[u8]) -> Node {
        let p = parse_ok(bytes);
        p.nodes[p.root].clone()
    }

    fn fixture(name: &str) -> Vec<u8> {
        let path = format!("{}/fixtures/pickle/{name}", env!("CARGO_MANIFEST_DIR"));
        std::fs::read(&path).unwrap_or_else(|e| panic!("{path}: {e}"))
    }

    fn round_trip(p: &Pickle) -> Pickle {
        let out = write(p);
        let again =
            parse(&out, &Limits::for_len(out.len())).unwrap_or_else(|e| panic!("re-parse: {e}"));
        assert!(p.equivalent(&again), "round trip changed the values");
        again
    }

    /// `GLOBAL torch FloatStorage` persistent id as the framework writes it.
    fn storage_pid(key: &str, numel: u8) -> Vec<u8> {
        cat(&[
            b"(",
            &uni("storage"),
            &glob("torch", "FloatStorage"),
            &uni(key),
            &uni("cpu"),
            &[b'K', numel],
            b"tQ",
        ])
    }

    /// `_rebuild_tensor_v2` call with the given argument bytes (without MARK/TUPLE).
    fn rebuild(args: &[u8]) -> Vec<u8> {
        cat(&[
            &glob("torch._utils", "_rebuild_tensor_v2"),
            b"(",
            args,
            b"tR",
        ])
    }

    fn tensor_2x3(key: &str) -> Vec<u8> {
        let hooks = cat(&[&glob("collections", "OrderedDict"), b")R"]);
        rebuild(&cat(&[
            &storage_pid(key, 6),
            b"K\x00K\x02K\x03\x86K\x03K\x01\x86\x89",
            &hooks,
        ]))
    }

    // ---- plain data ----

    #[test]
    fn scalar_opcodes_read_as_python_reads_them() {
        // Values: Python's pickletools opcode documentation.
        assert_eq!(root(b"N."), Node::None);
        assert_eq!(root(b"\x88."), Node::Bool(true));
        assert_eq!(root(b"\x89."), Node::Bool(false));
        assert_eq!(root(b"I00\n."), Node::Bool(false));
        assert_eq!(root(b"I01\n."), Node::Bool(true));
        assert_eq!(root(b"I-42\n."), Node::Int(-42));
        assert_eq!(root(b"J\xfe\xff\xff\xff."), Node::Int(-2));
        assert_eq!(root(b"K\xff."), Node::Int(255));
        assert_eq!(root(b"M\x00\x01."), Node::Int(256));
        assert_eq!(root(b"L-7L\n."), Node::Int(-7));
        assert_eq!(root(b"\x8a\x00."), Node::Int(0));
        assert_eq!(root(b"\x8a\x02\xff\x00."), Node::Int(255));
        assert_eq!(root(b"\x8b\x01\x00\x00\x00\xff."), Node::Int(-1));
        assert_eq!(root(b"F1.5\n."), Node::Float(1.5));
        assert_eq!(root(b"G?\xf8\x00\x00\x00\x00\x00\x00."), Node::Float(1.5));
        assert_eq!(root(b"S'a\\nb\\x41'\n."), Node::Str("a\nbA".into()));
        assert_eq!(root(b"T\x02\x00\x00\x00hi."), Node::Str("hi".into()));
        assert_eq!(root(b"U\x01\xff."), Node::Bytes(vec![0xff]));
        assert_eq!(root(b"V\\u00e4x\n."), Node::Str("\u{e4}x".into()));
        assert_eq!(
            root(b"X\x02\x00\x00\x00\xc3\xa4."),
            Node::Str("\u{e4}".into())
        );
        assert_eq!(root(b"\x8c\x01a."), Node::Str("a".into()));
        assert_eq!(
            root(b"\x8d\x01\x00\x00\x00\x00\x00\x00\x00a."),
            Node::Str("a".into())
        );
        assert_eq!(root(b"B\x01\x00\x00\x00z."), Node::Bytes(b"z".to_vec()));
        assert_eq!(root(b"C\x01z."), Node::Bytes(b"z".to_vec()));
        assert_eq!(
            root(b"\x8e\x01\x00\x00\x00\x00\x00\x00\x00z."),
            Node::Bytes(b"z".to_vec())
        );
        assert_eq!(
            root(b"\x96\x01\x00\x00\x00\x00\x00\x00\x00z."),
            Node::ByteArray(b"z".to_vec())
        );
    }

    #[test]
    fn integers_beyond_i64_keep_their_twos_complement_bytes() {
        // Bytes: Python's `pickle.encode_long(12345678901234567890)` and of -2**70.
        let big = vec![210, 10, 31, 235, 140, 169, 84, 171, 0];
        assert_eq!(
            root(b"L12345678901234567890L\n."),
            Node::BigInt(big.clone())
        );
        assert_eq!(root(b"I12345678901234567890\n."), Node::BigInt(big.clone()));
        assert_eq!(root(&cat(&[b"\x8a\x09", &big, b"."])), Node::BigInt(big));
        assert_eq!(
            root(b"L-1180591620717411303424\n."),
            Node::BigInt(vec![0, 0, 0, 0, 0, 0, 0, 0, 192])
        );
        // CPython refuses decimal integer text above 4300 digits (sys.int_info, 3.11+).
        let long = format!("I{}\n.", "9".repeat(4301));
        assert_eq!(parse_err(long.as_bytes()).rule, Rule::BadText("INT value"));
    }

    #[test]
    fn containers_memo_and_stack_opcodes() {
        let p = parse_ok(b"(K\x01K\x02t.");
        assert!(matches!(&p.nodes[p.root], Node::Tuple(v) if v.len() == 2));
        let p = parse_ok(b"K\x01K\x02K\x03\x87.");
        assert!(matches!(&p.nodes[p.root], Node::Tuple(v) if v.len() == 3));
        assert_eq!(root(b")."), Node::Tuple(vec![]));
        let p = parse_ok(b"(K\x01l]K\x02a(K\x03K\x04ea.");
        let Node::List(outer) = &p.nodes[p.root] else {
            panic!()
        };
        assert_eq!(outer.len(), 2);
        assert!(matches!(&p.nodes[outer[1]], Node::List(v) if v.len() == 3));
        let p = parse_ok(b"(K\x01K\x02dK\x03K\x04s(K\x05K\x06uK\x07\x8f(K\x08\x90s.");
        let Node::Dict { items, .. } = &p.nodes[p.root] else {
            panic!()
        };
        assert_eq!(items.len(), 4);
        assert!(matches!(&p.nodes[items[3].1], Node::Set(v) if v.len() == 1));
        assert!(matches!(root(b"(K\x01\x91."), Node::FrozenSet(v) if v.len() == 1));
        // PUT/GET text and binary forms, MEMOIZE, DUP, POP, POP_MARK, FRAME, PROTO 5.
        let stream = b"\x80\x05\x95\x00\x00\x00\x00\x00\x00\x00\x00(K\x01p7\nK\x02q\x01K\x03r\x09\x00\x00\x00\x94(N1N0g7\nh\x01j\x09\x00\x00\x00h\x03\x2ct.";
        let stream = stream.replace(b"\x2c", b"2");
        let p = parse_ok(&stream);
        assert_eq!(p.protocol, 5);
        let Node::Tuple(v) = &p.nodes[p.root] else {
            panic!()
        };
        let values: Vec<_> = v.iter().map(|&i| p.nodes[i].clone()).collect();
        let ints = |xs: &[i64]| xs.iter().map(|&x| Node::Int(x)).collect::<Vec<_>>();
        assert_eq!(values, ints(&[1, 2, 3, 1, 2, 3, 3, 3]));
    }

    trait Replace {
        fn replace(&self, from: &[u8], to: &[u8]) -> Vec<u8>;
    }

    impl Replace for [u8] {
        fn replace(&self, from: &[u8], to: &[u8]) -> Vec<u8> {
            let mut out = Vec::new();
            let mut i = 0;
            while i < self.len() {
                if self[i..].starts_with(from) {
                    out.extend_from_slice(to);
                    i += from.len();
                } else {
                    out.push(self[i]);
                    i += 1;
                }
            }
            out
        }
    }

    #[test]
    fn a_memoized_dict_filled_later_is_the_same_node_everywhere() {
        // Python semantics: GET returns the very object PUT stored.
        let p = parse_ok(b"}q\x00]q\x01h\x00ah\x00a0K\x01K\x02sh\x01\x86.");
        let Node::Tuple(pair) = &p.nodes[p.root] else {
            panic!()
        };
        let Node::List(list) = &p.nodes[pair[1]] else {
            panic!()
        };
        assert_eq!(list, &vec![pair[0], pair[0]]);
        assert!(matches!(&p.nodes[pair[0]], Node::Dict { items, .. } if items.len() == 1));
    }

    #[test]
    fn a_repeated_key_replaces_the_value_in_place_as_in_a_python_dict() {
        let p = parse_ok(&cat(&[
            b"}(",
            &uni("a"),
            b"K\x01",
            &uni("b"),
            b"K\x02",
            &uni("a"),
            b"K\x03u.",
        ]));
        let Node::Dict { items, .. } = &p.nodes[p.root] else {
            panic!()
        };
        let values: Vec<_> = items.iter().map(|&(_, v)| p.nodes[v].clone()).collect();
        assert_eq!(values, vec![Node::Int(3), Node::Int(2)]);
        // 1 and True are one key in Python.
        let p = parse_ok(b"}K\x01K\x01s\x88K\x02s.");
        assert!(matches!(&p.nodes[p.root], Node::Dict { items, .. } if items.len() == 1));
    }

    // ---- refusals ----

    #[test]
    fn opcodes_outside_the_allow_list_are_refused_with_offset_and_name() {
        for (stream, name) in [
            (&b"Ni__main__\nC\n."[..], "INST"),
            (b"No.", "OBJ"),
            (b"N\x82\x01.", "EXT1"),
            (b"N\x83\x01\x00.", "EXT2"),
            (b"N\x84\x01\x00\x00\x00.", "EXT4"),
            (b"NP0\n.", "PERSID"),
            (b"N\x97.", "NEXT_BUFFER"),
            (b"N\x98.", "READONLY_BUFFER"),
        ] {
            let e = parse_err(stream);
            assert_eq!(
                (e.offset, e.opcode.as_str(), &e.rule),
                (1, name, &Rule::Refused),
                "{e}"
            );
        }
        let e = parse_err(b"N\xff.");
        assert_eq!(
            (e.offset, e.opcode.as_str(), e.rule),
            (1, "0xff", Rule::Unknown)
        );
        assert_eq!(parse_err(b"\x80\x06N.").rule, Rule::Protocol(6));
        assert_eq!(parse_err(b"N").rule, Rule::NoStop);
        assert_eq!(parse_err(b"N.N").rule, Rule::TrailingBytes(1));
        assert_eq!(
            parse_err(b"NN.").rule,
            Rule::Leftover {
                values: 1,
                marks: 0
            }
        );
        assert_eq!(
            parse_err(b"(N.").rule,
            Rule::Leftover {
                values: 0,
                marks: 1
            }
        );
        assert_eq!(parse_err(b".").rule, Rule::StackUnderflow);
        assert_eq!(parse_err(b"]N(a.").rule, Rule::StackUnderflow);
        assert_eq!(parse_err(b"Nt.").rule, Rule::NoMark);
        assert_eq!(parse_err(b"h\x05.").rule, Rule::MemoMissing(5));
        assert_eq!(
            parse_err(b"}(N.").rule,
            Rule::Leftover {
                values: 1,
                marks: 1
            }
        );
        assert_eq!(parse_err(b"}(Nu.").rule, Rule::OddItems);
        assert_eq!(parse_err(b")K\x01a.").rule, Rule::WrongTarget("a tuple"));
        assert_eq!(parse_err(b"]NNs.").rule, Rule::WrongTarget("a list"));
        assert_eq!(parse_err(b"}Nb.").rule, Rule::WrongTarget("a dict"));
        assert_eq!(
            parse_err(b"S'abc\n.").rule,
            Rule::BadText("STRING argument must be quoted")
        );
        assert_eq!(parse_err(b"X\x01\x00\x00\x00\xff.").rule, Rule::BadUtf8);
        assert_eq!(parse_err(b"V\\ud800\n.").rule, Rule::BadUtf8);
        assert_eq!(parse_err(b"Ifoo\n.").rule, Rule::BadText("INT value"));
    }

    #[test]
    fn dangerous_calls_become_inert_opaque_nodes() {
        for (module, name) in [
            ("os", "system"),
            ("builtins", "eval"),
            ("subprocess", "Popen"),
            ("posix", "system"),
        ] {
            let stream = cat(&[&glob(module, name), &uni("echo owned"), b"\x85R."]);
            let p = parse_ok(&stream);
            let Node::Opaque {
                callable,
                how: Build::Reduce,
                ..
            } = &p.nodes[p.root]
            else {
                panic!("{module}.{name}")
            };
            assert_eq!(
                p.nodes[*callable],
                Node::Global {
                    module: module.into(),
                    name: name.into()
                }
            );
            // Written back unchanged, still inert.
            round_trip(&p);
        }
    }

    #[test]
    fn a_pickle_that_would_create_a_file_creates_none() {
        // Executed by Python's pickle, each of these calls creates `path`.
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join("created-by-pickle");
        let command = format!("touch {}", path.display());
        let streams = [
            cat(&[&glob("os", "system"), &uni(&command), b"\x85R."]),
            cat(&[
                &glob("builtins", "open"),
                &uni(&path.display().to_string()),
                &uni("w"),
                b"\x86R.",
            ]),
            cat(&[
                &glob("subprocess", "Popen"),
                b"(",
                &uni("touch"),
                &uni(&path.display().to_string()),
                b"l\x85R.",
            ]),
        ];
        for stream in streams {
            let p = parse_ok(&stream);
            let _ = (p.tensors(), write(&p));
            assert!(!path.exists(), "parsing ran the pickle");
        }
    }

    // ---- persistent ids, rebuild functions, objects ----

    #[test]
    fn storage_persistent_ids_and_nothing_else() {
        let p = parse_ok(&cat(&[&storage_pid("7", 6), b"."]));
        assert_eq!(
            p.nodes[p.root],
            Node::Storage {
                class: "FloatStorage".into(),
                key: "7".into(),
                location: "cpu".into(),
                numel: 6
            }
        );
        let bad = [
            cat(&[&uni("storage"), b"Q."]),
            cat(&[&uni("storage"), &uni("x"), b"\x86Q."]),
            cat(&[
                b"(",
                &uni("module"),
                &glob("torch", "FloatStorage"),
                &uni("7"),
                &uni("cpu"),
                b"K\x06tQ.",
            ]),
            cat(&[
                b"(",
                &uni("storage"),
                &glob("os", "system"),
                &uni("7"),
                &uni("cpu"),
                b"K\x06tQ.",
            ]),
            cat(&[
                b"(",
                &uni("storage"),
                &glob("torch", "FloatStorage"),
                b"K\x07",
                &uni("cpu"),
                b"K\x06tQ.",
            ]),
            cat(&[
                b"(",
                &uni("storage"),
                &glob("torch", "FloatStorage"),
                &uni("7"),
                &uni("cpu"),
                b"J\xff\xff\xff\xfftQ.",
            ]),
        ];
        for stream in bad {
            assert!(matches!(parse_err(&stream).rule, Rule::BadPersistentId(_)));
        }
    }

    #[test]
    fn tensor_and_parameter_rebuilds_are_checked_strictly() {
        let p = parse_ok(&cat(&[&tensor_2x3("0"), b"."]));
        let Node::Tensor {
            storage,
            offset: 0,
            size,
            stride,
            requires_grad: false,
            extra,
            ..
        } = &p.nodes[p.root]
        else {
            panic!()
        };
        assert_eq!(
            (size.as_slice(), stride.as_slice(), extra.len()),
            (&[2, 3][..], &[3, 1][..], 0)
        );
        assert!(matches!(&p.nodes[*storage], Node::Storage { key, .. } if key == "0"));

        let param =
            |args: &[u8], name: &str| cat(&[&glob("torch._utils", name), b"(", args, b"tR."]);
        let p = parse_ok(&param(
            &cat(&[&tensor_2x3("0"), b"\x88}"]),
            "_rebuild_parameter",
        ));
        assert!(
            matches!(p.nodes[p.root], Node::Parameter { requires_grad: true, ref extra, .. } if extra.is_empty())
        );
        let p = parse_ok(&param(
            &cat(&[&tensor_2x3("0"), b"\x88}}"]),
            "_rebuild_parameter_with_state",
        ));
        assert!(matches!(p.nodes[p.root], Node::Parameter { ref extra, .. } if extra.len() == 1));

        let pid = storage_pid("0", 6);
        let bad_tensors = [
            rebuild(&cat(&[&pid, b"K\x00K\x02\x85K\x01\x85\x89"])), // five arguments
            rebuild(&cat(&[b"N", b"K\x00K\x02\x85K\x01\x85\x89}"])), // no storage
            rebuild(&cat(&[&pid, b"J\xff\xff\xff\xffK\x02\x85K\x01\x85\x89}"])), // negative offset
            rebuild(&cat(&[&pid, b"K\x00K\x02\x85K\x01K\x01\x86\x89}"])), // size and stride disagree
            rebuild(&cat(&[&pid, b"K\x00K\x02\x85K\x01\x85K\x00}"])), // requires_grad not a bool
            rebuild(&cat(&[&pid, b"K\x00NK\x01\x85\x89}"])),          // size not a tuple
        ];
        for stream in bad_tensors {
            let e = parse_err(&cat(&[&stream, b"."]));
            assert!(
                matches!(
                    e.rule,
                    Rule::BadRebuild {
                        function: "_rebuild_tensor_v2",
                        ..
                    }
                ),
                "{e}"
            );
        }
        let e = parse_err(&param(b"N\x88}", "_rebuild_parameter"));
        assert!(
            matches!(
                e.rule,
                Rule::BadRebuild {
                    function: "_rebuild_parameter",
                    ..
                }
            ),
            "{e}"
        );
        let e = parse_err(&param(
            &cat(&[&tensor_2x3("0"), b"\x88"]),
            "_rebuild_parameter",
        ));
        assert!(matches!(e.rule, Rule::BadRebuild { .. }), "{e}");
        let e = parse_err(&cat(&[
            &glob("torch._utils", "_rebuild_tensor_v2"),
            b")\x81.",
        ]));
        assert!(matches!(e.rule, Rule::BadRebuild { .. }), "{e}");
        assert!(matches!(parse_err(b"NN\x85NR.").rule, Rule::BadCall(_)));
    }

    #[test]
    fn ordered_dicts_and_opaque_objects_record_what_is_done_to_them() {
        let od = cat(&[&glob("collections", "OrderedDict"), b")R"]);
        let p = parse_ok(&cat(&[&od, &uni("a"), b"K\x01s}b."]));
        assert!(
            matches!(&p.nodes[p.root], Node::Dict { ordered: true, state: Some(_), items } if items.len() == 1)
        );
        let p = parse_ok(&cat(&[&glob("collections", "OrderedDict"), b"]\x85R."]));
        assert!(matches!(&p.nodes[p.root], Node::Opaque { .. }));
        // argparse.Namespace as Python's protocol 2 writes it: NEWOBJ then BUILD.
        let ns = cat(&[
            &glob("argparse", "Namespace"),
            b")\x81}",
            &uni("lr"),
            b"G?\xb9\x99\x99\x99\x99\x99\x9asbK\x01aK\x02K\x03s.",
        ]);
        let p = parse_ok(&ns);
        let Node::Opaque {
            how: Build::NewObj,
            state: Some(_),
            items,
            appends,
            ..
        } = &p.nodes[p.root]
        else {
            panic!()
        };
        assert_eq!((items.len(), appends.len()), (1, 1));
        round_trip(&p);
        let p = parse_ok(&cat(&[&glob("m", "C"), b")}\x92."]));
        assert!(matches!(
            p.nodes[p.root],
            Node::Opaque {
                how: Build::NewObjEx { .. },
                ..
            }
        ));
        assert!(matches!(
            parse_err(&cat(&[&glob("m", "C"), b")N\x92."])).rule,
            Rule::BadCall(_)
        ));
        assert_eq!(
            parse_err(&cat(&[&glob("m", "C"), b")\x81}b}b."])).rule,
            Rule::SecondBuild
        );
        // STACK_GLOBAL gives the same reference as GLOBAL.
        assert_eq!(
            root(&cat(&[&uni("os"), &uni("system"), b"\x93."])),
            Node::Global {
                module: "os".into(),
                name: "system".into()
            }
        );
        assert!(matches!(
            parse_err(&cat(&[&uni("os\n"), &uni("system"), b"\x93."])).rule,
            Rule::NewlineInGlobal
        ));
    }

    // ---- bounds ----

    #[test]
    fn lengths_past_the_end_are_errors_not_allocations() {
        for stream in [
            &b"X\xff\xff\xff\xffab."[..],
            b"\x8d\xff\xff\xff\xff\xff\xff\xff\xffab.",
            b"\x8e\xff\xff\xff\xff\xff\xff\xff\x7fab.",
            b"\x96\xff\xff\xff\xff\xff\xff\xff\xffab.",
            b"B\x10\x00\x00\x00ab.",
            b"\x95\xff\xff\xff\xff\xff\xff\xff\xffN.",
            b"\x8a\x09\x01.",
            b"J\x01\x00",
            b"Ino newline",
        ] {
            assert!(
                matches!(parse_err(stream).rule, Rule::Truncated { .. }),
                "{stream:?}"
            );
        }
        assert_eq!(
            parse_err(b"T\xff\xff\xff\xffab.").rule,
            Rule::NegativeLength
        );
        assert_eq!(
            parse_err(b"\x8b\xff\xff\xff\xffab.").rule,
            Rule::NegativeLength
        );
    }

    #[test]
    fn memo_stack_mark_and_node_bombs_hit_their_limits() {
        let limits = Limits {
            max_nodes: 100,
            max_stack: 100,
            max_memo: 100,
            max_depth: 100,
        };
        // Memo bomb: distinct keys far apart; only the count matters, not the key values.
        let mut memo = b"N".to_vec();
        for k in 0..200u32 {
            memo.push(b'r');
            memo.extend_from_slice(&(u32::MAX - k).to_le_bytes());
        }
        memo.push(b'.');
        assert_eq!(
            parse(&memo, &limits).unwrap_err().rule,
            Rule::TooManyMemo(100)
        );
        assert!(parse(&memo, &Limits::for_len(memo.len())).is_ok());
        let stack: Vec<u8> = [&b"N"[..], &[b'2'; 200], b"."].concat();
        assert_eq!(
            parse(&stack, &limits).unwrap_err().rule,
            Rule::StackTooDeep(100)
        );
        let marks: Vec<u8> = [&[b'('; 200][..], b"N."].concat();
        assert_eq!(
            parse(&marks, &limits).unwrap_err().rule,
            Rule::StackTooDeep(100)
        );
        let nodes: Vec<u8> = [&b"]"[..], &b"Na".repeat(200), b"."].concat();
        assert_eq!(
            parse(&nodes, &limits).unwrap_err().rule,
            Rule::TooManyNodes(100)
        );
    }

    #[test]
    fn deep_nesting_is_refused_without_overflowing_the_stack() {
        let depth = 100_000;
        let nested: Vec<u8> = [&vec![b']'; depth][..], &vec![b'a'; depth - 1], b"."].concat();
        let e = parse_err(&nested);
        assert_eq!(
            (e.rule, e.opcode.as_str()),
            (Rule::TooDeep(PYTHON_RECURSION_LIMIT), "STOP")
        );
        let tuples: Vec<u8> = [&b"N"[..], &vec![0x85; depth], b"."].concat();
        assert_eq!(
            parse_err(&tuples).rule,
            Rule::TooDeep(PYTHON_RECURSION_LIMIT)
        );
        // Within CPython's recursion limit: parsed, named, written and read back.
        let fits: Vec<u8> = [&vec![b']'; 900][..], &vec![b'a'; 899], b"."].concat();
        let p = parse_ok(&fits);
        assert!(p.tensors().is_empty());
        round_trip(&p);
    }

    #[test]
    fn a_list_appended_to_itself_a_million_times_stays_small() {
        let n = 1_000_000;
        let stream: Vec<u8> = [&b"]q\x00("[..], &b"h\x00".repeat(n), b"e."].concat();
        let p = parse_ok(&stream);
        assert_eq!(p.nodes.len(), 1);
        assert!(p.tensors().is_empty());
        let out = write(&p);
        assert!(out.len() < 2 * stream.len(), "{} bytes", out.len());
        round_trip(&p);
    }

    // ---- names ----

    #[test]
    fn tensor_names_are_key_paths_with_escapes() {
        let t = tensor_2x3("0");
        let stream = cat(&[
            b"}(",
            &uni("model"),
            b"}(",
            &uni("blocks.0.attn/qkv%weight"),
            &t,
            b"K\x05",
            &t,
            b"\x88",
            &t,
            b"N",
            &t,
            b"u",
            &uni("list"),
            b"(N",
            &t,
            b"l",
            b"u.",
        ]);
        let p = parse_ok(&stream);
        let names: Vec<String> = p.tensors().into_iter().map(|(n, _)| n).collect();
        assert_eq!(
            names,
            [
                "model/blocks.0.attn%2Fqkv%25weight",
                "model/%{int 5}",
                "model/%{true}",
                "model/%{none}",
                "list/1"
            ]
        );
        let bare = parse_ok(&cat(&[
            b"}(",
            &uni("pos_embed"),
            &t,
            &uni("cls_token"),
            &t,
            b"u.",
        ]));
        let names: Vec<String> = bare.tensors().into_iter().map(|(n, _)| n).collect();
        assert_eq!(names, ["pos_embed", "cls_token"]);
    }

    // ---- writing ----

    #[test]
    fn written_streams_use_protocol_2_as_python_does() {
        // Python's pickle.dumps({'a': 1}, protocol=2) is b'\x80\x02}q\x00X\x01\x00\x00\x00aq\x01K\x01s.';
        // the writer memoizes only values referenced twice.
        let p = parse_ok(b"\x80\x02}q\x00X\x01\x00\x00\x00aq\x01K\x01s.");
        assert_eq!(write(&p), b"\x80\x02}X\x01\x00\x00\x00aK\x01s.");
        let p = parse_ok(b"\x80\x04\x95\x05\x00\x00\x00\x00\x00\x00\x00\x8f(K\x01\x90.");
        assert_eq!(
            write(&p)[..2],
            [0x80, 4],
            "a set needs protocol 4's EMPTY_SET"
        );
    }

    #[test]
    fn numbers_are_written_afresh_at_each_reference_as_python_does() {
        // Python's pickler memoizes neither ints nor None (pickle.py save_long, save_none).
        let p = parse_ok(b"K\x07q\x00Nq\x01\x86h\x00h\x01\x86\x86.");
        assert_eq!(write(&p), b"\x80\x02K\x07N\x86K\x07N\x86\x86.");
        round_trip(&p);
    }

    #[test]
    fn recursive_tuples_and_shared_values_survive_a_round_trip() {
        // L = []; t = (L,); L.append(t): Python's pickler resolves it with POP and GET.
        let p = parse_ok(b"]q\x00h\x00\x85q\x01ah\x01\x86.");
        let again = round_trip(&p);
        let Node::Tuple(pair) = &again.nodes[again.root] else {
            panic!()
        };
        assert!(matches!(&again.nodes[pair[0]], Node::List(l) if l == &[pair[1]]));
        assert!(matches!(&again.nodes[pair[1]], Node::Tuple(t) if t == &[pair[0]]));
        let big = (0..3000)
            .map(|i| cat(&[b"M", &(i as u16).to_le_bytes()]))
            .collect::<Vec<_>>()
            .concat();
        round_trip(&parse_ok(&cat(&[b"](", &big, b"e}(", &big, b"u\x86."])));
        round_trip(&parse_ok(&cat(&[b"(", &big, b"t."])));
    }

    // ---- files written by Python's own pickle module ----

    #[test]
    fn python_plain_data_in_protocols_0_to_5() {
        for protocol in 0..=5 {
            let p = parse_ok(&fixture(&format!("plain_p{protocol}.pkl")));
            // PROTO exists from protocol 2 on.
            assert_eq!(p.protocol, if protocol >= 2 { protocol } else { 0 });
            let Node::Dict { items, .. } = &p.nodes[p.root] else {
                panic!()
            };
            let get = |key: &str| {
                items
                    .iter()
                    .find(|(k, _)| p.nodes[*k] == Node::Str(key.into()))
                    .map(|&(_, v)| &p.nodes[v])
                    .unwrap()
            };
            // Values: the `plain_data()` literal in make_pickles.py.
            let Node::List(ints) = get("ints") else {
                panic!()
            };
            let ints: Vec<_> = ints.iter().map(|&i| p.nodes[i].clone()).collect();
            assert_eq!(
                ints[..11],
                [
                    0,
                    1,
                    -1,
                    255,
                    256,
                    65535,
                    65536,
                    -(1 << 31),
                    1 << 31,
                    i64::MAX,
                    i64::MIN
                ]
                .map(Node::Int)
            );
            assert_eq!(ints[11], Node::BigInt(vec![0, 0, 0, 0, 0, 0, 0, 0, 1]));
            let Node::List(text) = get("text") else {
                panic!()
            };
            assert_eq!(p.nodes[text[2]], Node::Str("p\u{e4}iv\u{e4}\u{e4}".into()));
            let Node::List(looped) = get("looped") else {
                panic!()
            };
            assert!(matches!(&p.nodes[looped[0]], Node::List(inner) if inner == looped));
            let Node::List(shared) = get("shared") else {
                panic!()
            };
            assert_eq!(shared[0], shared[1]);
            assert!(matches!(get("ordered"), Node::Dict { ordered: true, .. }));
            // Before protocol 2 Python writes objects as a REDUCE of copyreg._reconstructor.
            let Node::Opaque {
                how,
                state: Some(_),
                ..
            } = get("namespace")
            else {
                panic!()
            };
            assert_eq!(*how == Build::NewObj, protocol >= 2);
            let Node::List(floats) = get("floats") else {
                panic!()
            };
            assert_eq!(p.nodes[floats[2]], Node::Float(1e300));
            assert_eq!(p.nodes[floats[3]], Node::Float(f64::INFINITY));
            assert_eq!(p.nodes[text[3]], Node::Str("\u{65e5}\u{672c}".into()));
            if protocol >= 3 {
                assert_eq!(get("bytes"), &Node::Bytes(b"\x00\x01raw".to_vec()));
            }
            if protocol >= 4 {
                assert!(matches!(get("set"), Node::Set(v) if v.len() == 3));
                assert!(matches!(get("frozen"), Node::FrozenSet(v) if v.len() == 1));
            }
            round_trip(&p);
        }
    }

    #[test]
    fn python_written_checkpoint_layout() {
        // make_pickles.py `checkpoint()`: the framework's data.pkl layout, protocol 2.
        let p = parse_ok(&fixture("checkpoint_p2.pkl"));
        let tensors = p.tensors();
        let names: Vec<&str> = tensors.iter().map(|(n, _)| n.as_str()).collect();
        assert_eq!(
            names,
            [
                "model/pos_embed",
                "model/blocks.0.attn.qkv.weight",
                "model/head.weight",
                "model_ema/pos_embed"
            ]
        );
        let Node::Tensor {
            storage,
            offset: 20,
            size,
            stride,
            ..
        } = &p.nodes[tensors[3].1]
        else {
            panic!()
        };
        assert_eq!(
            (size.as_slice(), stride.as_slice()),
            (&[1, 5, 4][..], &[20, 4, 1][..])
        );
        assert!(
            matches!(&p.nodes[*storage], Node::Storage { key, numel: 40, class, .. } if key == "0" && class == "FloatStorage")
        );
        let Node::Parameter {
            data,
            requires_grad: true,
            ..
        } = p.nodes[tensors[2].1]
        else {
            panic!()
        };
        assert!(matches!(&p.nodes[data], Node::Tensor { stride, .. } if stride == &[1, 3]));
        let Node::Dict { items, .. } = &p.nodes[p.root] else {
            panic!()
        };
        assert!(matches!(
            &p.nodes[items[0].1],
            Node::Dict {
                ordered: true,
                state: Some(_),
                ..
            }
        ));
        // Python's pickler names each global once and fetches it from the memo afterwards.
        let count =
            |bytes: &[u8], what: &[u8]| bytes.windows(what.len()).filter(|w| *w == what).count();
        let original = fixture("checkpoint_p2.pkl");
        let rewritten = write(&p);
        for name in [&b"_rebuild_tensor_v2"[..], b"FloatStorage", b"OrderedDict"] {
            assert_eq!(count(&original, name), 1);
            assert_eq!(count(&rewritten, name), 1);
        }
        round_trip(&p);
    }

    /// Loads each fixture and its rewrite with Python's own pickle module and compares their
    /// values. Needs `python3`; run with `cargo test --lib checkpoint::pickle -- --ignored`.
    #[test]
    #[ignore]
    fn python_loads_each_rewritten_fixture_as_the_original() {
        let dir = tempfile::tempdir().expect("temp dir");
        let fixtures = format!("{}/fixtures/pickle", env!("CARGO_MANIFEST_DIR"));
        for name in [
            "checkpoint_p2.pkl",
            "plain_p0.pkl",
            "plain_p1.pkl",
            "plain_p2.pkl",
            "plain_p3.pkl",
            "plain_p4.pkl",
            "plain_p5.pkl",
        ] {
            let out = dir.path().join(name);
            std::fs::write(&out, write(&parse_ok(&fixture(name)))).expect("write");
            let run = std::process::Command::new("python3")
                .arg(format!("{fixtures}/make_pickles.py"))
                .arg("--check")
                .arg(format!("{fixtures}/{name}"))
                .arg(&out)
                .output()
                .expect("python3");
            let said = String::from_utf8_lossy(&run.stdout);
            assert_eq!(
                said.trim(),
                "same",
                "{name}: {}",
                String::from_utf8_lossy(&run.stderr)
            );
        }
    }
}
