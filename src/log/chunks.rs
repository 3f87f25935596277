//! Cutting a byte stream into blocks of whole CSV records, so blocks can be parsed in
//! parallel. A block ends at a newline outside any quoted field (even quote parity), so a
//! quoted field that spans lines is never split. Each block knows its first line number.

use std::io::{self, Read};

/// Target block size. Large enough that per-block overhead vanishes, small enough that a batch
/// of blocks per thread stays a few tens of MB.
pub const BLOCK: usize = 4 << 20;

/// Bytes asked of the source per read call.
const READ: usize = 1 << 20;

/// A block of whole records and the 1-based line its first record starts on.
pub struct Block {
    pub bytes: Vec<u8>,
    pub first_line: u64,
}

pub struct Chunker {
    src: Box<dyn Read + Send>,
    buf: Vec<u8>,
    eof: bool,
    next_line: u64,
    /// Buffers of parsed blocks, reused so that the hot loop allocates (and page-faults) no
    /// fresh memory after the first batch.
    pool: Vec<Vec<u8>>,
}

impl Chunker {
    pub fn new(src: Box<dyn Read + Send>) -> Chunker {
        Chunker {
            src,
            buf: Vec::with_capacity(BLOCK + READ),
            eof: false,
            next_line: 1,
            pool: Vec::new(),
        }
    }

    /// Returns a block's buffer for reuse.
    pub fn recycle(&mut self, mut bytes: Vec<u8>) {
        bytes.clear();
        self.pool.push(bytes);
    }

    /// The rest of the underlying stream (to drain it after an error).
    pub fn source(&mut self) -> &mut Box<dyn Read + Send> {
        &mut self.src
    }

    /// Reads (straight into the buffer) until it holds `want` bytes or the stream ends.
    fn fill(&mut self, want: usize) -> io::Result<()> {
        while !self.eof && self.buf.len() < want {
            let len = self.buf.len();
            self.buf.resize(len + READ, 0);
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
    pub fn next_block(&mut self) -> io::Result<Option<Block>> {
        let mut want = BLOCK;
        let cut = loop {
            self.fill(want)?;
            if self.buf.is_empty() {
                return Ok(None);
            }
            if self.eof {
                break self.buf.len();
            }
            match last_record_end(&self.buf) {
                Some(end) => break end,
                // No record boundary yet (a very long line): read more.
                None => want = self.buf.len() * 2,
            }
        };
        let mut next = self
            .pool
            .pop()
            .unwrap_or_else(|| Vec::with_capacity(BLOCK + READ));
        next.extend_from_slice(&self.buf[cut..]);
        self.buf.truncate(cut);
        let bytes = std::mem::replace(&mut self.buf, next);
        let first_line = self.next_line;
        self.next_line += memchr::memchr_iter(b'\n', &bytes).count() as u64;
        Ok(Some(Block { bytes, first_line }))
    }
}

/// One past the last newline that lies outside quotes, if any.
fn last_record_end(buf: &[u8]) -> Option<usize> {
    if memchr::memchr(b'"', buf).is_none() {
        return memchr::memrchr(b'\n', buf).map(|i| i + 1);
    }
    let mut in_quotes = false;
    let mut end = None;
    for (i, &b) in buf.iter().enumerate() {
        match b {
            b'"' => in_quotes = !in_quotes,
            b'\n' if !in_quotes => end = Some(i + 1),
            _ => {}
        }
    }
    end
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cuts_only_between_records() {
        assert_eq!(last_record_end(b"a,b\nc,d\ne"), Some(8));
        assert_eq!(last_record_end(b"a,\"x\ny\"\nz,\"p\nq"), Some(8));
        assert_eq!(last_record_end(b"no newline"), None);
    }

    #[test]
    fn blocks_reassemble_the_stream_and_count_lines() {
        let text: String = (0..400_000)
            .map(|i| format!("{i},\"a\nb\",{}\n", i * 2))
            .collect();
        let mut c = Chunker::new(Box::new(std::io::Cursor::new(text.clone().into_bytes())));
        let mut joined = Vec::new();
        let mut line = 1;
        while let Some(b) = c.next_block().unwrap() {
            assert_eq!(b.first_line, line);
            line += b.bytes.iter().filter(|&&x| x == b'\n').count() as u64;
            assert!(b.bytes.ends_with(b"\n"));
            joined.extend_from_slice(&b.bytes);
        }
        assert_eq!(joined, text.as_bytes());
    }
}
