//! Hostile input: random bytes and random mutations of a valid log must give Ok or an error,
//! never a panic or a hang (proptest reports a panic as a failure; every loop in the reader
//! consumes input, so a test that returns shows it terminates on that input).

use super::{LogReader, Progress, ReadOptions};
use proptest::prelude::*;

const VALID: &str = "episode,step,reward,terminated,truncated,value,next_value,score_0,score_1\n\
    a,0,1.5,0,0,0.2,,0.1,-0.3\n\
    b,0,-2,0,0,0.4,,0.5,0.5\n\
    a,1,0.25,0,1,0.1,3.0,1,2\n\
    b,1,1e3,1,0,0.3,,-1,0\n\
    c,0,7,0,0,1,,0,0\n";

/// Reads everything; returns the number of episodes or the error text.
fn read_all(bytes: Vec<u8>) -> Result<usize, String> {
    let opts = ReadOptions {
        progress: Progress::Hidden,
        ..ReadOptions::default()
    };
    let mut r = LogReader::from_reader(
        Box::new(std::io::Cursor::new(bytes)),
        "fuzz.csv",
        &opts,
        None,
    )
    .map_err(|e| e.to_string())?;
    let mut n = 0;
    while let Some(ep) = r.next_episode().map_err(|e| e.to_string())? {
        assert!(!ep.rewards.is_empty());
        assert_eq!(ep.scores.len(), ep.len() * ep.score_dim);
        assert!(ep.rewards.iter().all(|x| x.is_finite()));
        n += 1;
    }
    Ok(n)
}

#[derive(Debug, Clone)]
enum Edit {
    Flip(usize, u8),
    Insert(usize, u8),
    Delete(usize),
    Duplicate(usize, usize),
}

fn edit() -> impl Strategy<Value = Edit> {
    prop_oneof![
        (any::<usize>(), any::<u8>()).prop_map(|(i, b)| Edit::Flip(i, b)),
        (
            any::<usize>(),
            prop::sample::select(b",\n\r\"0.-e9 a".to_vec())
        )
            .prop_map(|(i, b)| Edit::Insert(i, b)),
        any::<usize>().prop_map(Edit::Delete),
        (any::<usize>(), 1usize..40).prop_map(|(i, n)| Edit::Duplicate(i, n)),
    ]
}

fn apply(mut bytes: Vec<u8>, edits: &[Edit]) -> Vec<u8> {
    for e in edits {
        let n = bytes.len().max(1);
        match *e {
            Edit::Flip(i, b) if !bytes.is_empty() => bytes[i % n] = b,
            Edit::Insert(i, b) => bytes.insert(i % (bytes.len() + 1), b),
            Edit::Delete(i) if !bytes.is_empty() => {
                bytes.remove(i % n);
            }
            Edit::Duplicate(i, len) if !bytes.is_empty() => {
                let start = i % n;
                let end = (start + len).min(bytes.len());
                let piece = bytes[start..end].to_vec();
                bytes.splice(start..start, piece);
            }
            _ => {}
        }
    }
    bytes
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 2000, ..ProptestConfig::default() })]

    #[test]
    fn random_bytes_never_panic(bytes in prop::collection::vec(any::<u8>(), 0..400)) {
        let _ = read_all(bytes);
    }

    #[test]
    fn mutated_logs_never_panic(edits in prop::collection::vec(edit(), 1..8)) {
        let bytes = apply(VALID.as_bytes().to_vec(), &edits);
        if let Err(msg) = read_all(bytes) {
            // Every error names the file.
            prop_assert!(msg.starts_with("fuzz.csv"), "{msg}");
        }
    }
}

#[test]
fn the_unmutated_log_reads() {
    assert_eq!(read_all(VALID.as_bytes().to_vec()), Ok(3));
}

// Block-cut invariance (item 6 of the hardening issue): whatever the block and read sizes,
// cutting and parsing in blocks gives exactly what the csv crate gives reading the whole
// input sequentially (the reference: csv::Reader with its default quoting and CR/LF/CRLF
// terminators), every record then typed by the rules spelled out in `reference`.
mod blocks {
    use crate::log::chunks::{ChunkError, Chunker, Tuning};
    use crate::log::rows::RowParser;
    use crate::log::{ColumnSpec, Schema, fields};
    use proptest::prelude::*;

    #[derive(Debug, PartialEq)]
    struct Rec {
        line: u64,
        id: Vec<u8>,
        step: i64,
        reward: f64,
        terminated: bool,
    }

    /// The records read, then the first error's (line, 0-based column) if any.
    type Parse = (Vec<Rec>, Option<(u64, Option<usize>)>);

    fn parser() -> RowParser {
        let headers = ["episode", "step", "reward", "terminated"];
        let schema = Schema::resolve(
            &ColumnSpec::default(),
            headers.iter().map(|h| h.to_string()).collect(),
            "p.csv",
        )
        .unwrap();
        RowParser::new(&schema, "p.csv", b',')
    }

    /// Line breaks before byte `end`, counted naively: \n, \r\n and a lone \r once each.
    fn line_of(bytes: &[u8], mut start: usize) -> u64 {
        while start < bytes.len() && matches!(bytes[start], b'\r' | b'\n') {
            start += 1;
        }
        let mut n = 1;
        for i in 0..start {
            if bytes[i] == b'\n' || (bytes[i] == b'\r' && bytes.get(i + 1) != Some(&b'\n')) {
                n += 1;
            }
        }
        n
    }

    fn reference(bytes: &[u8]) -> Parse {
        let mut rdr = csv::ReaderBuilder::new()
            .has_headers(false)
            .flexible(true)
            .from_reader(bytes);
        let mut out = Vec::new();
        let mut rec = csv::ByteRecord::new();
        while rdr
            .read_byte_record(&mut rec)
            .expect("byte records never fail")
        {
            let line = line_of(bytes, rec.position().unwrap().byte() as usize);
            // The order RowParser::row checks in: field count, empty id, reward, step, flag.
            if rec.len() != 4 {
                return (out, Some((line, None)));
            }
            if rec[0].trim_ascii().is_empty() {
                return (out, Some((line, Some(0))));
            }
            let Ok(reward) = fields::number(&rec[2]) else {
                return (out, Some((line, Some(2))));
            };
            let Ok(step) = fields::integer(&rec[1]) else {
                return (out, Some((line, Some(1))));
            };
            let Ok(terminated) = fields::boolean(&rec[3]) else {
                return (out, Some((line, Some(3))));
            };
            out.push(Rec {
                line,
                id: rec[0].to_vec(),
                step,
                reward,
                terminated,
            });
        }
        (out, None)
    }

    fn blocked(bytes: &[u8], tuning: Tuning) -> Parse {
        let p = parser();
        let mut c = Chunker::new(Box::new(std::io::Cursor::new(bytes.to_vec())), b',', tuning);
        let mut out = Vec::new();
        loop {
            let b = match c.next_block() {
                Ok(Some(b)) => b,
                Ok(None) => return (out, None),
                Err(ChunkError::RecordTooLong { line, .. }) => return (out, Some((line, None))),
                Err(ChunkError::Io(e)) => panic!("{e}"),
                Err(ChunkError::Budget(e)) => panic!("no budget is charged here: {e}"),
            };
            let parsed = p.parse(&b.bytes, b.first_line);
            for r in &parsed.rows {
                out.push(Rec {
                    line: r.line,
                    id: parsed.id(r).to_vec(),
                    step: r.step.unwrap(),
                    reward: r.reward,
                    terminated: r.terminated,
                });
            }
            if let Some(crate::Error::Input(e)) = parsed.error {
                return (
                    out,
                    Some((e.at.line.unwrap(), e.at.column.map(|c| c.0 - 1))),
                );
            }
        }
    }

    /// One row: an id (plain, with a stray quote, quoted across a line break, with a doubled
    /// quote, empty, or quoted and never closed), then step, reward and flag, each sometimes
    /// malformed, and a random line ending.
    fn row() -> impl Strategy<Value = String> {
        let ending = prop::sample::select(vec!["\n", "\r\n", "\r"]);
        (
            prop::sample::select(vec![
                "a",
                "b",
                "c",
                "a\"b",
                "\"q{E}r\"",
                "\"p\"\"q\"",
                "\"x\"y",
                "",
                "\"open",
                " \"s\"",
            ]),
            prop::sample::select(vec!["0", "1", "2", "x"]),
            prop::sample::select(vec!["1.5", "-2", "0", "y", "\"3\""]),
            prop::sample::select(vec!["0", "1", "1,extra", "maybe"]),
            ending.clone(),
            ending,
            prop::sample::select(vec![0u8, 0, 0, 0, 1, 2]),
        )
            .prop_map(|(id, step, reward, flag, end, inner, blank)| {
                let id = id.replace("{E}", inner);
                let blank = if blank == 1 { end } else { "" };
                format!("{id},{step},{reward},{flag}{end}{blank}")
            })
    }

    /// Rows mostly well formed, so that parses get far before an error.
    fn log() -> impl Strategy<Value = Vec<u8>> {
        let good = prop::sample::select(vec!["a,0,1,0\n", "b,1,2.5,1\r\n", "c,2,-1,0\r"]);
        (
            prop::collection::vec(
                prop_oneof![3 => good.prop_map(String::from), 1 => row()],
                0..40,
            ),
            any::<bool>(),
        )
            .prop_map(|(rows, cut_last_break)| {
                let mut text = rows.concat().into_bytes();
                if cut_last_break {
                    while matches!(text.last(), Some(b'\n' | b'\r')) {
                        text.pop();
                    }
                }
                text
            })
    }

    proptest! {
        #![proptest_config(ProptestConfig { cases: 3000, ..ProptestConfig::default() })]

        #[test]
        fn block_cuts_never_change_the_parse(
            bytes in log(),
            block in 1usize..48,
            read in 1usize..16,
        ) {
            let want = reference(&bytes);
            prop_assert_eq!(blocked(&bytes, Tuning::inline(block, read)), want);
        }
    }

    // The reproduction of item 6, small: a stray quote on an early line and a legitimate
    // quoted id spanning a line later parse the same in 7-byte blocks as sequentially.
    #[test]
    fn stray_quote_then_quoted_line_break() {
        let text = b"a\"b,0,1,0\nc,0,1,1\n\"d\ne\",0,2,1\nf,0,3,1\n";
        let want = reference(text);
        assert_eq!(want.0.len(), 4);
        assert_eq!(want.1, None);
        assert_eq!(want.0[2].id, b"d\ne");
        assert_eq!(want.0[3].line, 5);
        assert_eq!(blocked(text, Tuning::inline(7, 3)), want);
    }
}
