//! Cutting a byte stream into blocks of whole CSV records, so blocks can be parsed in
//! parallel. Every cut lies where a sequential CSV reader (the csv crate's defaults: `"`
//! quotes, doubled quotes inside quoted fields, `\n`, `\r\n` or a lone `\r` ending a record)
//! would be between records, so the parse never depends on where blocks fall: a stray quote
//! inside an unquoted field (`a"b`) is text, a quoted field that spans lines stays whole.
//!
//! The scan is a small state machine over the bytes since the last cut (which is always a
//! record start, so nothing needs carrying across blocks). A cut right after `\r` is taken
//! only when the next byte is known not to be `\n`, so a block never ends inside a CRLF pair
//! and line counts ([`line_breaks`]) add up across blocks.
//!
//! Memory: the buffer holds one block plus one read, and grows past that only while one
//! record is longer than the block; a record longer than `max_record` is an error
//! ([`ChunkError::RecordTooLong`]) rather than an unbounded buffer.

use std::io::{self, Read};

/// Largest target block size. Large enough that per-block overhead vanishes, small enough
/// that a batch of blocks per thread stays a few tens of MB.
pub const BLOCK: usize = 4 << 20;

/// Largest read asked of the source per call.
const READ: usize = 1 << 20;

/// Bytes of a parsed block per raw byte, at most, for sizing blocks: a short row (about 15
/// bytes, e.g. `1234567,1,1,0.5`) parses into a row record of about 120 bytes plus 8 per
/// vector field and its id.
const PARSED: u64 = 10;

/// Sizes that drive the reader: the target block, the read size, the longest record, and
/// whether blocks are parsed ahead on a producer thread (otherwise inline, on demand).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Tuning {
    pub block: usize,
    pub read: usize,
    pub max_record: usize,
    pub threaded: bool,
}

impl Tuning {
    /// The sizes for a memory budget: the blocks in flight (raw and parsed, see
    /// `pipeline.rs`) aim at a quarter of it, and one record within an eighth (at most
    /// [`crate::limits::MAX_RECORD_BYTES`]). What they really hold is charged to the
    /// budget's ledger as they fill ([`Chunker::with_budget`], `Parsed::settle`). Budgets too
    /// small for 64 kB blocks on the producer thread parse smaller blocks inline.
    pub fn for_budget(budget: &crate::limits::Budget) -> Tuning {
        let share = budget.bytes / crate::limits::READER_SHARE;
        let batch = super::pipeline::batch() as u64;
        // Raw blocks: one batch plus the buffer being filled (two blocks' worth); parsed
        // blocks: 4 batches + 2, each up to about PARSED times its raw bytes.
        let in_flight = (batch + 2) + PARSED * (4 * batch + 2);
        let record = (budget.bytes / 8).min(crate::limits::MAX_RECORD_BYTES as u64) as usize;
        if share / in_flight >= 64 << 10 {
            let block = (share / in_flight).min(BLOCK as u64) as usize;
            return Tuning::new(block, READ, record, true);
        }
        // Inline: the buffer being filled, one block out and one pooled; up to three parsed.
        let block = (share / (3 + 3 * PARSED)).clamp(4 << 10, 64 << 10) as usize;
        Tuning::new(block, READ.min(block), record, false)
    }

    /// Small blocks parsed inline: for tests and fuzzing, where blocks must fall everywhere.
    pub fn inline(block: usize, read: usize) -> Tuning {
        Tuning::new(block, read, crate::limits::MAX_RECORD_BYTES, false)
    }

    /// Keeps the invariants the cut relies on: read <= block, so a buffer grown for one long
    /// record holds no other record longer than `max_record`; and `max_record` >= block +
    /// read, so an ungrown buffer holds none either. Then the too-long error depends only on
    /// the file, not on where blocks fall.
    pub fn new(block: usize, read: usize, max_record: usize, threaded: bool) -> Tuning {
        let block = block.max(1);
        let read = read.clamp(1, block);
        Tuning {
            block,
            read,
            max_record: max_record.max(block + read),
            threaded,
        }
    }
}

/// How the last block ends: after a line break, or cut short.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Tail {
    /// After a line break (every block but the last, and a last one that ends properly).
    #[default]
    Complete,
    /// The file's last record has no line break after it.
    NoLineBreak,
    /// The file ends inside a quoted field.
    InsideQuotes,
}

/// A block of whole records and the 1-based line its first record starts on.
pub struct Block {
    pub bytes: Vec<u8>,
    pub first_line: u64,
    pub tail: Tail,
}

/// Why no block could be cut.
#[derive(Debug)]
pub enum ChunkError {
    Io(io::Error),
    /// A record starting on `line` runs past `limit` bytes without ending.
    RecordTooLong {
        line: u64,
        limit: usize,
    },
    /// The raw buffers would take the memory budget's ledger over its limit.
    Budget(crate::error::Error),
}

pub struct Chunker {
    src: Box<dyn Read + Send>,
    buf: Vec<u8>,
    eof: bool,
    next_line: u64,
    delimiter: u8,
    tuning: Tuning,
    /// Buffers of parsed blocks, reused so that the hot loop allocates (and page-faults) no
    /// fresh memory after the first batch.
    pool: Vec<Vec<u8>>,
    /// The raw buffers' capacity on the budget's ledger ([`Chunker::with_budget`]): the one
    /// being filled, the pool, and the blocks handed out (`out` bytes) not yet recycled.
    charge: Option<crate::limits::Charge>,
    out: u64,
    pooled: u64,
}

impl Chunker {
    pub fn new(src: Box<dyn Read + Send>, delimiter: u8, tuning: Tuning) -> Chunker {
        Chunker {
            src,
            buf: Vec::with_capacity(tuning.block + tuning.read),
            eof: false,
            next_line: 1,
            delimiter,
            tuning,
            pool: Vec::new(),
            charge: None,
            out: 0,
            pooled: 0,
        }
    }

    /// Charges the raw buffers to `budget`'s ledger as the reader's.
    pub fn with_budget(mut self, budget: &crate::limits::Budget) -> Chunker {
        self.charge = Some(budget.charge(crate::limits::Holder::Reader));
        self
    }

    /// The budget charged, if any.
    pub fn budget(&self) -> Option<&crate::limits::Budget> {
        self.charge.as_ref().map(crate::limits::Charge::budget)
    }

    /// Returns a block's buffer for reuse.
    pub fn recycle(&mut self, mut bytes: Vec<u8>) {
        bytes.clear();
        let cap = bytes.capacity() as u64;
        self.out = self.out.saturating_sub(cap);
        self.pooled += cap;
        self.pool.push(bytes);
    }

    /// Sets the charge to what the raw buffers hold now.
    fn settle(&mut self) -> Result<(), ChunkError> {
        let bytes = self.buf.capacity() as u64 + self.pooled + self.out;
        match &mut self.charge {
            Some(c) => c
                .set(
                    bytes,
                    || "the reader's raw blocks".to_string(),
                    "raise --max-memory (the reader sizes its blocks from it)",
                )
                .map_err(ChunkError::Budget),
            None => Ok(()),
        }
    }

    /// The rest of the underlying stream (to drain it after an error).
    pub fn source(&mut self) -> &mut Box<dyn Read + Send> {
        &mut self.src
    }

    /// Reads (straight into the buffer) until it holds `want` bytes or the stream ends.
    fn fill(&mut self, want: usize) -> io::Result<()> {
        while !self.eof && self.buf.len() < want {
            let len = self.buf.len();
            self.buf.resize(len + self.tuning.read, 0);
            let got = loop {
                match self.src.read(&mut self.buf[len..]) {
                    Ok(n) => break n,
                    Err(e) if e.kind() == io::ErrorKind::Interrupted => continue,
                    Err(e) => {
                        self.buf.truncate(len);
                        return Err(e);
                    }
                }
            };
            self.buf.truncate(len + got);
            self.eof = got == 0;
        }
        Ok(())
    }

    /// The next block, or None at the end of the stream.
    pub fn next_block(&mut self) -> Result<Option<Block>, ChunkError> {
        let limit = self.tuning.max_record;
        let mut want = self.tuning.block;
        let (cut, tail) = loop {
            self.fill(want).map_err(ChunkError::Io)?;
            // A long record grows the buffer: charged before it grows further.
            self.settle()?;
            if self.buf.is_empty() {
                return Ok(None);
            }
            let scan = scan(&self.buf, self.delimiter, self.eof);
            let start = scan.cut.unwrap_or(0);
            // Two bytes of slack for a record's line break.
            if (scan.cut.is_none() || self.eof) && self.buf.len() - start > limit + 2 {
                let line = self.next_line + line_breaks(&self.buf[..start]);
                return Err(ChunkError::RecordTooLong { line, limit });
            }
            if self.eof {
                break (self.buf.len(), scan.tail);
            }
            match scan.cut {
                Some(end) => break (end, Tail::Complete),
                // No record boundary yet (a long record): read more, up to the limit.
                None => want = (self.buf.len() * 2).min(limit + 3),
            }
        };
        let mut next = match self.pool.pop() {
            Some(b) => {
                self.pooled -= b.capacity() as u64;
                b
            }
            None => Vec::with_capacity(self.tuning.block + self.tuning.read),
        };
        next.extend_from_slice(&self.buf[cut..]);
        self.buf.truncate(cut);
        let bytes = std::mem::replace(&mut self.buf, next);
        self.out += bytes.capacity() as u64;
        self.settle()?;
        let first_line = self.next_line;
        self.next_line += line_breaks(&bytes);
        Ok(Some(Block {
            bytes,
            first_line,
            tail,
        }))
    }
}

/// Line breaks in `bytes`: `\n`, `\r\n` and a lone `\r` each count once (a `\r` at the very
/// end counts: a block never ends between `\r` and `\n`).
pub fn line_breaks(bytes: &[u8]) -> u64 {
    let lf = memchr::memchr_iter(b'\n', bytes).count() as u64;
    let lone_cr = memchr::memchr_iter(b'\r', bytes)
        .filter(|&i| bytes.get(i + 1) != Some(&b'\n'))
        .count() as u64;
    lf + lone_cr
}

/// Where the CSV tokenizer is (the csv-core reader's states that matter for record ends).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum State {
    /// Before a record (blank lines are skipped here).
    RecordStart,
    FieldStart,
    Unquoted,
    Quoted,
    /// Just after a quote inside a quoted field: `"` again is a literal quote.
    QuoteInQuoted,
}

/// The last cut in a buffer that starts at a record start, and how the buffer ends.
#[derive(Debug, PartialEq, Eq)]
struct Scan {
    /// One past the last line break that ends a record (or a blank line), if any.
    cut: Option<usize>,
    /// How the buffer ends, meaningful when it is the end of the file.
    tail: Tail,
}

/// Scans `buf`, which starts at a record start; `eof` says no byte follows it.
fn scan(buf: &[u8], delimiter: u8, eof: bool) -> Scan {
    let is_break = |b: u8| b == b'\n' || b == b'\r';
    // A cut after byte i (a line break) is valid unless it splits a CRLF pair or the byte
    // after a `\r` is not read yet.
    let valid = |i: usize| buf[i] == b'\n' || buf.get(i + 1).map_or(eof, |&n| n != b'\n');
    if memchr::memchr(b'"', buf).is_none() {
        // Without quotes every line break ends a record.
        let mut end = buf.len();
        let cut = loop {
            match memchr::memrchr2(b'\n', b'\r', &buf[..end]) {
                Some(i) if valid(i) => break Some(i + 1),
                Some(i) => end = i,
                None => break None,
            }
        };
        let tail = match buf.last() {
            Some(&b) if is_break(b) => Tail::Complete,
            _ => Tail::NoLineBreak,
        };
        return Scan { cut, tail };
    }
    let mut state = State::RecordStart;
    let mut cut = None;
    for (i, &b) in buf.iter().enumerate() {
        state = match state {
            State::Quoted if b == b'"' => State::QuoteInQuoted,
            State::Quoted => State::Quoted,
            State::QuoteInQuoted if b == b'"' => State::Quoted,
            State::RecordStart | State::FieldStart if b == b'"' => State::Quoted,
            _ if is_break(b) => {
                if valid(i) {
                    cut = Some(i + 1);
                }
                State::RecordStart
            }
            _ if b == delimiter => State::FieldStart,
            _ => State::Unquoted,
        };
    }
    let tail = match state {
        State::RecordStart => Tail::Complete,
        State::Quoted => Tail::InsideQuotes,
        _ => Tail::NoLineBreak,
    };
    Scan { cut, tail }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn cut(buf: &[u8]) -> Option<usize> {
        scan(buf, b',', false).cut
    }

    #[test]
    fn cuts_only_between_records() {
        assert_eq!(cut(b"a,b\nc,d\ne"), Some(8));
        assert_eq!(cut(b"a,\"x\ny\"\nz,\"p\nq"), Some(8));
        assert_eq!(cut(b"no newline"), None);
        // A quote inside an unquoted field is text: the line break after it ends the record.
        assert_eq!(cut(b"a\"b,1\nc,2"), Some(6));
        // A doubled quote inside a quoted field does not close it.
        assert_eq!(cut(b"\"a\"\"\nb\",1\nc"), Some(10));
        // Text after a closing quote continues the field unquoted.
        assert_eq!(cut(b"\"a\"b\nc"), Some(5));
    }

    #[test]
    fn never_splits_crlf_and_takes_lone_cr() {
        assert_eq!(cut(b"a,b\r\nc,d\r"), Some(5));
        assert_eq!(scan(b"a,b\r\nc,d\r", b',', true).cut, Some(9));
        assert_eq!(cut(b"a,b\rc,d\re"), Some(8));
        assert_eq!(cut(b"\"q\",b\r\nc,d\r"), Some(7));
        assert_eq!(line_breaks(b"a\rb\r\nc\nd\r"), 4);
    }

    #[test]
    fn classifies_the_end_of_the_file() {
        let tail = |b: &[u8]| scan(b, b',', true).tail;
        assert_eq!(tail(b"a,b\n"), Tail::Complete);
        assert_eq!(tail(b"a,b\r"), Tail::Complete);
        assert_eq!(tail(b"a,b\nc,d"), Tail::NoLineBreak);
        assert_eq!(tail(b"a,\"b\"\nc,\"d\""), Tail::NoLineBreak);
        assert_eq!(tail(b"a,\"b\"\nc,\"d\nx"), Tail::InsideQuotes);
        assert_eq!(tail(b"a,b\"\n"), Tail::Complete);
    }

    fn blocks(text: &[u8], tuning: Tuning) -> Result<Vec<Block>, ChunkError> {
        let mut c = Chunker::new(Box::new(std::io::Cursor::new(text.to_vec())), b',', tuning);
        let mut out = Vec::new();
        while let Some(b) = c.next_block()? {
            out.push(b);
        }
        Ok(out)
    }

    // Blocks sized from the budget: the blocks in flight aim at a quarter of it (PARSED
    // times the raw bytes for the parsed ones); budgets too small for 64 kB blocks on the
    // producer thread parse 4 to 64 kB blocks inline.
    #[test]
    fn block_sizes_follow_the_budget() {
        use crate::limits::Budget;
        let batch = super::super::pipeline::batch() as u64;
        let in_flight = (batch + 2) + PARSED * (4 * batch + 2);
        let big = Tuning::for_budget(&Budget::from_mb(1000));
        assert!(big.threaded);
        assert_eq!(
            big.block as u64,
            ((1000 << 20) / 4 / in_flight).min(BLOCK as u64)
        );
        assert!(in_flight * big.block as u64 <= (1000 << 20) / 4);
        let small = Tuning::for_budget(&Budget::from_mb(4));
        assert!(!small.threaded);
        assert!((4 << 10..=64 << 10).contains(&small.block));
        assert!((3 + 3 * PARSED) * small.block as u64 <= 1 << 20);
        assert_eq!(small.max_record, 512 << 10);
        let tiny = Tuning::for_budget(&Budget::from_mb(0));
        assert_eq!((tiny.threaded, tiny.block), (false, 4 << 10));
    }

    #[test]
    fn blocks_reassemble_the_stream_and_count_lines() {
        let text: String = (0..400_000)
            .map(|i| format!("{i},\"a\nb\",{}\r\n", i * 2))
            .collect();
        let mut joined = Vec::new();
        let mut line = 1;
        for b in blocks(
            text.as_bytes(),
            Tuning::for_budget(&crate::limits::Budget::from_mb(1 << 20)),
        )
        .unwrap()
        {
            assert_eq!(b.first_line, line);
            line += line_breaks(&b.bytes);
            assert!(b.bytes.ends_with(b"\r\n"));
            joined.extend_from_slice(&b.bytes);
        }
        assert_eq!(joined, text.as_bytes());
        assert_eq!(line, 800_001);
    }

    // Item 16 of the hardening issue: a record that never ends must not grow the buffer
    // without bound; the error names the line it starts on and the limit.
    #[test]
    fn a_record_longer_than_the_limit_is_refused() {
        let mut text = b"h,r\n1,2\n\"".to_vec();
        text.extend(std::iter::repeat_n(b'x', 10_000));
        match blocks(&text, Tuning::new(64, 16, 1000, false)) {
            Err(ChunkError::RecordTooLong { line, limit }) => assert_eq!((line, limit), (3, 1000)),
            other => panic!("{:?}", other.map(|b| b.len())),
        }
        // The same length within the limit reads.
        assert!(blocks(&text, Tuning::new(64, 16, 20_000, false)).is_ok());
    }
}
