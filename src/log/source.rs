//! Opening a log: a path, a gzip-compressed path (detected by its magic bytes, whatever its
//! name) or `-` for standard input, with an optional progress bar on the raw bytes read.
//! Gzip is decompressed on its own thread, a few 1 MB chunks ahead of the parser.

use crate::error::{Error, Result};
use indicatif::{ProgressBar, ProgressStyle};
use std::fs::File;
use std::io::{self, BufRead, BufReader, IsTerminal, Read};

/// Name used in messages for standard input.
pub const STDIN_NAME: &str = "<stdin>";

/// How the progress of reading is shown.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Progress {
    /// A bar on stderr, only if stderr is a terminal.
    Auto,
    Hidden,
}

/// Display name for a path as given on the command line.
pub fn display_name(path: &str) -> String {
    if path == "-" {
        STDIN_NAME.to_string()
    } else {
        path.to_string()
    }
}

/// An opened log: the (decompressed) bytes, the progress bar, and whether it was compressed.
pub struct Source {
    pub reader: Box<dyn Read + Send>,
    pub bar: Option<ProgressBar>,
    pub compressed: bool,
}

/// Opens `path` for reading, decompressing gzip transparently.
pub fn open(path: &str, progress: Progress) -> Result<Source> {
    let name = display_name(path);
    let (raw, len): (Box<dyn Read + Send>, Option<u64>) = if path == "-" {
        (Box::new(io::stdin()), None)
    } else {
        let file = File::open(path).map_err(|e| Error::io(&name, e))?;
        let len = file.metadata().ok().map(|m| m.len());
        (Box::new(file), len)
    };
    let bar = match progress {
        Progress::Auto if io::stderr().is_terminal() && len.is_some_and(|l| l > 8 << 20) => {
            let bar = ProgressBar::new(len.unwrap_or(0));
            bar.set_style(
                ProgressStyle::with_template("reading {bytes}/{total_bytes} {wide_bar} {eta}")
                    .unwrap_or_else(|_| ProgressStyle::default_bar()),
            );
            Some(bar)
        }
        _ => None,
    };
    let counted: Box<dyn Read + Send> = match &bar {
        Some(bar) => Box::new(bar.wrap_read(raw)),
        None => raw,
    };
    let (reader, compressed) = decompressed(counted).map_err(|e| Error::io(&name, e))?;
    Ok(Source {
        reader,
        bar,
        compressed,
    })
}

/// Buffers a byte stream and, if it starts with gzip's magic bytes (whatever the file is
/// called), decompresses it (flate2 with the zlib-rs backend) on a thread of its own, ahead of
/// the parser; also says whether it did.
pub fn decompressed(raw: Box<dyn Read + Send>) -> io::Result<(Box<dyn Read + Send>, bool)> {
    let mut buffered = BufReader::with_capacity(1 << 16, raw);
    let compressed = buffered.fill_buf()?.starts_with(&[0x1f, 0x8b]);
    let reader: Box<dyn Read + Send> = if compressed {
        Box::new(ReadAhead::spawn(flate2::bufread::MultiGzDecoder::new(
            buffered,
        )))
    } else {
        Box::new(buffered)
    };
    Ok((reader, compressed))
}

/// Columnar log formats, detected by their magic bytes (like gzip, whatever the file is
/// called) and read through [`super::columnar`] rather than as bytes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Columnar {
    Parquet,
    /// Arrow IPC file format (`ARROW1` magic; also Feather version 2).
    ArrowFile,
    /// Arrow IPC stream format (a message continuation marker first).
    ArrowStream,
}

impl Columnar {
    /// What the first bytes of a file say it is, if a columnar format.
    pub fn from_magic(head: &[u8]) -> Option<Columnar> {
        if head.starts_with(b"PAR1") {
            Some(Columnar::Parquet)
        } else if head.starts_with(b"ARROW1") {
            Some(Columnar::ArrowFile)
        } else if head.starts_with(&[0xff, 0xff, 0xff, 0xff]) {
            Some(Columnar::ArrowStream)
        } else {
            None
        }
    }

    /// The columnar format of the file at `path` (never stdin, which is read as CSV).
    pub fn of_path(path: &str) -> Option<Columnar> {
        if path == "-" {
            return None;
        }
        let mut head = [0u8; 8];
        let mut f = File::open(path).ok()?;
        let mut n = 0;
        while n < head.len() {
            match f.read(&mut head[n..]) {
                Ok(0) | Err(_) => break,
                Ok(k) => n += k,
            }
        }
        Columnar::from_magic(&head[..n])
    }

    pub fn name(self) -> &'static str {
        match self {
            Columnar::Parquet => "Parquet",
            Columnar::ArrowFile | Columnar::ArrowStream => "Arrow IPC",
        }
    }
}

/// Bytes per chunk handed from the decompressing thread to the reader.
const AHEAD_CHUNK: usize = 1 << 20;
/// Chunks the decompressing thread may run ahead: bounds the memory it holds to a few MB.
const AHEAD_CHUNKS: usize = 4;

/// A reader fed by a thread that reads its source ahead in chunks, so that decompression and
/// parsing overlap. The source's error (a damaged gzip stream) arrives in order, after the
/// bytes before it; when the reader is dropped the thread stops at its next chunk.
struct ReadAhead {
    chunks: std::sync::mpsc::Receiver<io::Result<Vec<u8>>>,
    /// Emptied chunks go back to the thread, so a long read allocates only a few.
    spare: std::sync::mpsc::SyncSender<Vec<u8>>,
    current: Vec<u8>,
    pos: usize,
    done: bool,
}

impl ReadAhead {
    fn spawn(mut source: impl Read + Send + 'static) -> ReadAhead {
        let (tx, chunks) = std::sync::mpsc::sync_channel(AHEAD_CHUNKS);
        let (spare, returned) = std::sync::mpsc::sync_channel::<Vec<u8>>(AHEAD_CHUNKS + 2);
        std::thread::spawn(move || {
            loop {
                let mut buf = returned.try_recv().unwrap_or_default();
                buf.resize(AHEAD_CHUNK, 0);
                let mut filled = 0;
                let outcome = loop {
                    match source.read(&mut buf[filled..]) {
                        Ok(0) => break Ok(()),
                        Ok(n) => {
                            filled += n;
                            if filled == buf.len() {
                                break Ok(());
                            }
                        }
                        Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
                        Err(e) => break Err(e),
                    }
                };
                buf.truncate(filled);
                let last = filled < AHEAD_CHUNK || outcome.is_err();
                if filled > 0 && tx.send(Ok(buf)).is_err() {
                    return; // the reader is gone
                }
                if let Err(e) = outcome {
                    let _ = tx.send(Err(e));
                    return;
                }
                if last {
                    return;
                }
            }
        });
        ReadAhead {
            chunks,
            spare,
            current: Vec::new(),
            pos: 0,
            done: false,
        }
    }
}

impl Read for ReadAhead {
    fn read(&mut self, out: &mut [u8]) -> io::Result<usize> {
        while self.pos == self.current.len() {
            if self.done {
                return Ok(0);
            }
            match self.chunks.recv() {
                Ok(Ok(chunk)) => {
                    let old = std::mem::replace(&mut self.current, chunk);
                    let _ = self.spare.try_send(old);
                    self.pos = 0;
                }
                Ok(Err(e)) => {
                    self.done = true;
                    return Err(e);
                }
                // The thread finished: every byte has been handed over.
                Err(_) => self.done = true,
            }
        }
        let n = out.len().min(self.current.len() - self.pos);
        out[..n].copy_from_slice(&self.current[self.pos..self.pos + n]);
        self.pos += n;
        Ok(n)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Write;

    fn gz(bytes: &[u8]) -> Vec<u8> {
        let mut enc = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
        enc.write_all(bytes).unwrap();
        enc.finish().unwrap()
    }

    // Several chunks and a partial last one come through the read-ahead thread unchanged, and
    // two concatenated gzip members read as one stream (RFC 1952, 2.2: a file is a series of
    // members).
    #[test]
    fn read_ahead_returns_every_byte_in_order() {
        let text: Vec<u8> = (0..3 * AHEAD_CHUNK + 12_345)
            .map(|i| (i * 7 % 251) as u8)
            .collect();
        let mut packed = gz(&text[..1000]);
        packed.extend(gz(&text[1000..]));
        let (mut r, compressed) = decompressed(Box::new(std::io::Cursor::new(packed))).unwrap();
        assert!(compressed);
        let mut out = Vec::new();
        r.read_to_end(&mut out).unwrap();
        assert_eq!(out, text);
    }

    // A damaged stream: the bytes before the damage arrive, then the decoder's error.
    #[test]
    fn read_ahead_reports_a_cut_stream_after_its_bytes() {
        let text: Vec<u8> = (0..2 * AHEAD_CHUNK)
            .map(|i| (i % 13) as u8 + b'a')
            .collect();
        let mut packed = gz(&text);
        packed.truncate(packed.len() - 20);
        let (mut r, _) = decompressed(Box::new(std::io::Cursor::new(packed))).unwrap();
        let mut out = Vec::new();
        let err = r.read_to_end(&mut out).unwrap_err();
        assert!(
            out.len() > AHEAD_CHUNK && text.starts_with(&out),
            "{}",
            out.len()
        );
        assert_ne!(err.kind(), io::ErrorKind::Interrupted);
    }
}
