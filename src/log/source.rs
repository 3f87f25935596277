//! Opening a log: a path, a gzip-compressed path (detected by its magic bytes, whatever its
//! name) or `-` for standard input, with an optional progress bar on the raw bytes read.

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
/// called), decompresses it; also says whether it did.
pub fn decompressed(raw: Box<dyn Read + Send>) -> io::Result<(Box<dyn Read + Send>, bool)> {
    let mut buffered = BufReader::with_capacity(1 << 16, raw);
    let compressed = buffered.fill_buf()?.starts_with(&[0x1f, 0x8b]);
    let reader: Box<dyn Read + Send> = if compressed {
        Box::new(flate2::bufread::MultiGzDecoder::new(buffered))
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
